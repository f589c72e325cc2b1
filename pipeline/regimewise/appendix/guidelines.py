"""The item lists of the three reporting checklists a run is mapped to: numbers, sections and short wording.

The wording is our own short paraphrase of each item, never the published text. Where each list was checked,
and against what, is recorded beside it (``checked_against``) and copied into checklist.json, so a reader can
tell a checked number from one taken on trust:

- TARGET (Cashin et al. 2025): 21 items in 6 sections, as the statement's abstract says (read in several stored
  copies: JAMA 334:1084, doi 10.1001/jama.2025.13350; BMJ 2025;390:e087179). The published checklist table itself
  was not available here; the item numbers, their sub-items (1a-1c, 6a-6h, 7a-7f, 7g(i)-(ii), 7h(i)-(ii): 39 in
  all) and their order come from two secondary reproductions of that table, which agree with each other; re-check
  them against the table itself. The table number within the statement is not verified.
- RECORD (Benchimol et al. 2015): 13 items, as the statement's abstract says; numbers and intent checked against
  the RECORD checklist table as reproduced in PMC articles (PMC5434499 Table 1, PMC11064235, a checklist copy
  titled "The RECORD statement - checklist of items, extended from the STROBE statement ...").
- Gottesman et al. 2019: the Comment is organised under three questions (its headings; no table, no numbers:
  Q1-Q3 are ours, in the paper's order), checked against two secondary sources that quote the Comment. The
  Comment itself (paywalled) was not read; that it raises no further headed question is not verified.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Item:
    number: str
    section: str
    wording: str


@dataclass(frozen=True)
class Guideline:
    key: str
    title: str
    citation: str
    source_table: str
    wording: str
    checked_against: str
    counts: str
    scope_note: str | None
    items: tuple[Item, ...]


def _items(section: str, *rows: tuple[str, str]) -> tuple[Item, ...]:
    return tuple(Item(number, section, wording) for number, wording in rows)


TARGET = Guideline(
    key="target",
    title="TARGET: transparent reporting of observational studies emulating a target trial",
    citation=(
        "Cashin AG, Hansford HJ, Hernán MA, et al. Transparent reporting of observational studies emulating a "
        "target trial: the TARGET statement. JAMA 2025;334(12):1084-1093 (doi 10.1001/jama.2025.13350); "
        "co-published in BMJ 2025;390:e087179"
    ),
    source_table="the TARGET checklist table of the statement (its table number not verified here)",
    wording="paraphrased in our own words; the published wording is the statement's",
    checked_against=(
        "item count and sections: the statement's abstract; item numbers, sub-items and order: two secondary "
        "reproductions of the published checklist table, which agree (the table itself not read here)"
    ),
    counts="21 numbered items (certain: the abstract); 39 sub-items (from the two encodings, which agree)",
    scope_note=(
        "TARGET's stated scope is a parallel-group, individually randomised target trial with adjustment for "
        "baseline confounders. Dynamic treatment strategies, decisions repeated over time and confounding that "
        "changes with the patient's state go beyond that scope; items X1-X6 below are this tool's additions for "
        "them, not part of TARGET."
    ),
    items=(
        *_items(
            "Abstract",
            ("1a", "Identify it as a target trial emulation with observational data; objectives; the trial in brief"),
            ("1b", "Name the data sources used for the emulation"),
            ("1c", "Summarise key assumptions, statistical methods, findings and conclusions"),
        ),
        *_items(
            "Introduction",
            ("2", "Scientific background and the gap in knowledge"),
            ("3", "The causal question the target trial protocol specifies"),
            ("4", "Why a target trial is emulated with these data; cite trials that informed its design"),
        ),
        *_items(
            "Methods: data",
            ("5", "Data sources: original purpose, type, places, setting, period; linkage or pooling"),
        ),
        *_items(
            "Methods: target trial specification",
            ("6a", "Eligibility criteria"),
            ("6b", "Treatment strategies, in enough detail to carry out"),
            ("6c", "Assignment: random assignment to the strategies, awareness of the assignment"),
            ("6d", "Follow-up: starts at assignment; when it ends"),
            ("6e", "Outcomes, their measurement and timing"),
            ("6f", "Causal contrasts and effect measures"),
            ("6g", "Assumptions identifying each causal estimand, and the variables they involve"),
            ("6h", "Data analysis plan for each estimand, including missing data"),
        ),
        *_items(
            "Methods: emulation with the data",
            ("7a", "How eligibility was operationalised with the data"),
            ("7b", "How the treatment strategies were operationalised"),
            ("7c", "How assignment to the strategies was operationalised"),
            ("7d", "Follow-up starting at assignment; how its end was operationalised"),
            ("7e", "How the outcomes were operationalised"),
            ("7f", "How the causal contrasts and effect measures were operationalised"),
            ("7g(i)", "Identifying assumptions made for each estimand, including baseline confounding"),
            ("7g(ii)", "How the variables those assumptions involve were operationalised"),
            ("7h(i)", "Analysis of each estimand as carried out, modelling assumptions, missing data"),
            ("7h(ii)", "Additional analyses of sensitivity to operationalisation, assumptions and analysis choices"),
        ),
        *_items(
            "Results",
            ("8", "Numbers assessed, eligible and assigned to each strategy (a flow diagram)"),
            ("9", "Baseline characteristics by treatment strategy"),
            ("10", "Length of follow-up and reasons it ended, by strategy and contrast"),
            ("11", "Missing data in every variable, by strategy"),
            ("12", "Frequency or distribution of each outcome, by strategy"),
            ("13", "Effect estimate of each contrast with its precision; absolute and relative measures"),
            ("14", "Results of the additional (sensitivity) analyses"),
        ),
        *_items(
            "Discussion",
            ("15", "Interpretation of the key findings in view of the causal question"),
            ("16", "Limitations: target trial versus emulation, plausibility of the assumptions"),
        ),
        *_items(
            "Other information",
            ("17", "Ethics approval"),
            ("18", "Protocol registration: whether, when, where"),
            ("19", "Access to data, analytic code and materials"),
            ("20", "Funding and the funders' role"),
            ("21", "Conflicts of interest"),
        ),
        *_items(
            "Beyond TARGET's scope (this tool's additions)",
            ("X1", "Decision points: how many, when, and what is decided at each"),
            ("X2", "Usual-care (treatment) model at every decision: fit and overlap"),
            ("X3", "Effective sample size behind every estimate, and the minimum trusted"),
            ("X4", "Constraints on the learned regime: clinical rules, support, pessimism"),
            ("X5", "Which strategies the records can identify, and which they cannot"),
            ("X6", "How the learned regime was evaluated on data it was not learned from"),
        ),
    ),
)

RECORD = Guideline(
    key="record",
    title="RECORD: the STROBE extension for observational routinely collected health data",
    citation=(
        "Benchimol EI, Smeeth L, Guttmann A, et al. The REporting of studies Conducted using Observational "
        "Routinely-collected health Data (RECORD) statement. PLoS Med 2015;12(10):e1001885"
    ),
    source_table=(
        'the checklist table "The RECORD statement - checklist of items, extended from the STROBE statement, '
        'that should be reported in observational studies using routinely collected health data"'
    ),
    wording="paraphrased in our own words; the published wording is the statement's",
    checked_against=(
        "item count: the statement's abstract; numbers and intent: the RECORD checklist table as reproduced in "
        "PMC5434499 (Table 1) and PMC11064235, and a copy of the RECORD checklist"
    ),
    counts="13 items (certain), numbered after the STROBE items they extend; the STROBE items are not repeated",
    scope_note=None,
    items=(
        *_items(
            "Title and abstract (STROBE 1)",
            ("1.1", "Type of data, and the names of the databases where possible"),
            ("1.2", "Geographic region and time frame, if applicable"),
            ("1.3", "Linkage between databases, if done"),
        ),
        *_items(
            "Participants (STROBE 6)",
            ("6.1", "How the study population was selected (codes, algorithms), in detail"),
            ("6.2", "Validation studies of those codes or algorithms"),
            ("6.3", "A diagram of the linkage process, if databases were linked"),
        ),
        *_items("Variables (STROBE 7)", ("7.1", "Complete list of codes and algorithms classifying every variable")),
        *_items(
            "Statistical methods (STROBE 12)",
            ("12.1", "Investigators' access to the database population"),
            ("12.2", "Data cleaning methods"),
            ("12.3", "Linkage: level, methods, and evaluation of its quality"),
        ),
        *_items(
            "Participants, results (STROBE 13)",
            ("13.1", "Selection of the persons included, with filtering on data quality, availability, linkage"),
        ),
        *_items(
            "Limitations (STROBE 19)",
            ("19.1", "Implications of data not collected for this question: misclassification, confounding, ..."),
        ),
        *_items(
            "Other information (STROBE 22)",
            ("22.1", "How to access supplementary material: protocol, raw data, code"),
        ),
    ),
)

GOTTESMAN = Guideline(
    key="gottesman",
    title="Questions for treatment policies learned from observational data",
    citation=(
        "Gottesman O, Johansson F, Komorowski M, Faisal A, Sontag D, Doshi-Velez F, Celi LA. Guidelines for "
        "reinforcement learning in healthcare. Nat Med 2019;25(1):16-18 (doi 10.1038/s41591-018-0310-5)"
    ),
    source_table="the Comment's three question headings (the Comment has no checklist table)",
    wording="paraphrased in our own words from the headings as quoted by third parties",
    checked_against="two secondary sources quoting the Comment's headings; the Comment itself was not read",
    counts="3 questions (as quoted); numbering Q1-Q3 is ours, in the Comment's order",
    scope_note=None,
    items=(
        *_items(
            "Questions",
            ("Q1", "Did the analysis have every variable that influenced the clinicians' decisions?"),
            ("Q2", "How large is the effective sample behind the evaluation, really?"),
            ("Q3", "Will the learned policy behave as intended when used prospectively?"),
        ),
    ),
)

GUIDELINES = (TARGET, RECORD, GOTTESMAN)
