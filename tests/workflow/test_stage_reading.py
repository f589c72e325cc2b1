"""What the stages read: a column subset gives the very numbers the whole table gives."""

from __future__ import annotations

import numpy as np
import pandas as pd

from regimewise.io import read_parquet, write_parquet
from regimewise.workflow.stages import proba_columns, read_probabilities


def test_probabilities_read_alone_are_those_of_the_whole_table(tmp_path):
    # the old reading (every column, then the probability ones), written out: same bytes, same memory layout
    rng = np.random.default_rng(7)
    labels = ["hold", "step_down", "step_up", "add_agent"]
    raw = rng.dirichlet(np.ones(len(labels)), size=5_000)
    table = pd.DataFrame({"episode_id": [f"E{i // 8:05d}" for i in range(len(raw))], "step": np.arange(len(raw)) % 8})
    table[proba_columns(labels)] = raw
    path = tmp_path / "behaviour_proba.parquet"
    write_parquet(path, table)
    whole = read_parquet(path)[proba_columns(labels)].to_numpy(dtype=float)
    alone = read_probabilities(path, labels)
    assert alone.tobytes() == whole.tobytes()
    assert alone.strides == whole.strides and alone.flags["F_CONTIGUOUS"] == whole.flags["F_CONTIGUOUS"]
