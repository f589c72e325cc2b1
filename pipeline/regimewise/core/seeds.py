"""The table of random streams: every random draw of an analysis comes from the protocol's one root seed.

A stream is ``numpy.random.SeedSequence(root_seed, spawn_key=(STREAMS[name], *index))``; the index selects a
replicate (bootstrap) or a specification and replicate (sweep), so a job's bytes depend neither on the shard that
runs it nor on the number of shards. The numbers are fixed forever: changing one changes every result that
uses it. Numbers 3, 4, 5 and 8 were used by earlier versions and stay retired.
"""

from __future__ import annotations

import numpy as np

STREAMS = {
    "usual_care": 1,  # folds and model seed of the usual-care model
    "regime": 2,  # folds, boosting seeds and bootstrap ensemble of the Q-models
    "bootstrap": 6,  # (6, r): the resample of bootstrap replicate r
    "cross_fit": 7,  # patient folds of the cross-fitted evaluation of the learned regime
    "sweep": 9,  # (9, i, r): replicate r of sweep specification i
    "readable_tree": 10,  # the patients a readable tree is fitted on, above its row cap
    "selfcheck": 11,  # (11, c): simulated cohort c of the self-check and the draws of its truths
    "selfcheck_reference": 12,  # the self-check's reference rule (for the learned regime's regret)
}

# What each stream draws and what its index selects (written to the appendix's seeds.json).
STREAM_USES = {
    "usual_care": ("folds and model seed of the usual-care model", ()),
    "regime": ("folds, boosting seeds and bootstrap ensemble of the Q-models", ()),
    "bootstrap": ("the resample of bootstrap replicate r", ("r",)),
    "cross_fit": ("patient folds of the cross-fitted evaluation of the learned regime", ()),
    "sweep": ("replicate r of sweep specification i", ("i", "r")),
    "readable_tree": ("the patients the readable tree is fitted on when the decisions exceed its row cap", ()),
    "selfcheck": ("simulated cohort c of the self-check and the draws of its truths", ("c",)),
    "selfcheck_reference": ("the simulated cohorts the self-check's reference rule is fitted on", ()),
}

RETIRED = (3, 4, 5, 8)  # numbers used by earlier versions; never reused


def stream(root_seed: int, name: str, *index: int) -> np.random.SeedSequence:
    """The seed sequence of stream ``name`` (a key of :data:`STREAMS`) at ``index`` under ``root_seed``."""
    return np.random.SeedSequence(root_seed, spawn_key=(STREAMS[name], *index))


def stream_ints(root_seed: int, name: str, count: int = 1) -> list[int]:
    """``count`` integer seeds drawn from stream ``name`` (for estimators that take an integer ``random_state``)."""
    return [int(x) for x in stream(root_seed, name).generate_state(count)]


def stream_rng(root_seed: int, name: str, *index: int) -> np.random.Generator:
    """A generator on stream ``name`` at ``index``."""
    return np.random.default_rng(stream(root_seed, name, *index))
