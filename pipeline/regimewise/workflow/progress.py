"""Progress on the terminal while the workflow runs, read from Snakemake's own log stream of job events.

Snakemake announces each job (``rule <name>:`` or ``localrule <name>:`` with its ``jobid`` and ``wildcards``)
and each finished one (``Finished jobid: <id> (Rule: <name>)``, followed by ``<k> of <n> steps (<p>%) done``).
:class:`Progress` turns those events into one line per finished stage, e.g. ``[5/14] bootstrap shard 2 of 4
done (38 s)``. The command line feeds it the workflow log as Snakemake writes it; no output file is polled, and
a job's time runs from its announcement to its finish. Statistical warnings the stages raise reach the same
stream, and each stage also writes them to its own log; their count is read back from the stage logs at the end
(:func:`warning_line`), so a rerun that rebuilds only the report still counts the warnings behind the estimates.
"""

from __future__ import annotations

import re
import time
from pathlib import Path

# What each rule does, in words (a rule not listed is named as it is).
STAGE_WORDS = {
    "validate": "validation of the records",
    "behaviour": "usual-care model",
    "behaviour_diagnostics": "usual-care model's diagnostics",
    "crossfit": "cross-fitted fold regimes",
    "regime_fit": "regime learning",
    "regime": "recommendations of the learned regimes",
    "evaluate_fixed": "off-policy evaluation of usual care and the fixed strategies",
    "evaluate_learned": "off-policy evaluation of the learned regime and its strategies",
    "evaluate_side": "off-policy evaluation of the side-by-side regimes",
    "describe": "cohort description",
    "sensitivity_curves": "sensitivity bounds over the confounding strengths",
    "combine": "values, bootstrap intervals and sensitivity analysis",
    "survival": "survival analysis",
    "sweep": "specification sweep",
    "selfcheck": "self-check on look-alike cohorts",
    "report": "report",
    "appendix": "audit appendix (manifest, environment, protocol, seeds, commands, checklist)",
    "all": "final check of all outputs",
}


_JOB = re.compile(r"^(?:local)?rule (\w+):\s*$")
_JOBID = re.compile(r"^\s+jobid: (\d+)\s*$")
_WILDCARDS = re.compile(r"^\s+wildcards: (.*)$")
_FINISHED = re.compile(r"^Finished job(?:id)?:?\s+(\d+)")
_STEPS = re.compile(r"^(\d+) of (\d+) steps \(")


class Progress:
    """Reads Snakemake's log lines one at a time; :meth:`feed` returns a progress line when a job has finished.

    ``shards`` is the protocol's number of bootstrap shards (a resumed run reruns only some of them, so the
    count Snakemake plans is not the total); ``clock`` gives seconds (a test passes a fake one).
    """

    def __init__(self, shards: int = 0, clock=time.monotonic):
        self.shards, self.clock = shards, clock
        self.jobs: dict[str, dict] = {}
        self.announced: dict | None = None
        self.finished: str | None = None

    def feed(self, line: str) -> str | None:
        line = line.rstrip("\n")
        if match := _JOB.match(line):
            self.announced = {"rule": match[1], "wildcards": {}, "started": self.clock()}
        elif self.announced is not None and (match := _JOBID.match(line)):
            self.jobs[match[1]] = self.announced
        elif self.announced is not None and (match := _WILDCARDS.match(line)):
            pairs = (item.split("=", 1) for item in match[1].split(", ") if "=" in item)
            self.announced["wildcards"] = {key.strip(): value.strip() for key, value in pairs}
        elif match := _FINISHED.match(line):
            self.announced, self.finished = None, match[1]
        elif (match := _STEPS.match(line)) and self.finished is not None:
            job = self.jobs.pop(self.finished, None)
            self.finished = None
            if job is not None:
                seconds = self.clock() - job["started"]
                return f"[{match[1]}/{match[2]}] {self.describe(job)} done ({seconds:.0f} s)"
        return None

    def describe(self, job: dict) -> str:
        rule, wildcards = job["rule"], job["wildcards"]
        if rule == "bootstrap_shard" and wildcards.get("shard", "").isdigit():
            of = f" of {self.shards}" if self.shards else ""
            return f"bootstrap shard {int(wildcards['shard']) + 1}{of}"
        if rule == "sweep_spec":
            return f"sweep specification {wildcards.get('spec', '')}".rstrip()
        if rule == "selfcheck_cohort":
            return f"self-check cohort {wildcards.get('cohort', '')}".rstrip()
        return STAGE_WORDS.get(rule, rule)


WARNING_MARK = "WARNING StatisticalWarning: "
WORKFLOW_LOG = "workflow.log"


def warning_counts(logs: Path) -> dict[Path, int]:
    """Statistical warnings per stage log in folder ``logs`` (``<rule>.log``, each rewritten when its rule reruns, so
    together they hold the warnings of the results as they stand, also after a rerun of only some stages); Snakemake's
    own ``workflow.log``, which holds one invocation's jobs only, is not counted. Only logs with a warning."""
    counts = {}
    for path in sorted(logs.glob("*.log")):
        if path.name == WORKFLOW_LOG:
            continue
        try:
            text = path.read_text(encoding="utf-8", errors="replace")
        except OSError:
            continue
        count = sum(line.startswith(WARNING_MARK) for line in text.splitlines())
        if count:
            counts[path] = count
    return counts


def warning_line(logs: Path) -> str:
    """The closing line about statistical warnings: how many the stages behind the current results raised, and which
    stage logs list them."""
    counts = warning_counts(logs)
    total = sum(counts.values())
    if total == 0:
        return "no statistical warnings"
    noun = "warning" if total == 1 else "warnings"
    return f"{total} statistical {noun} (read them before the estimates); listed in {', '.join(map(str, counts))}"
