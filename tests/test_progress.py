"""Progress reports of the compress passes (common practice: one report per block, one per pass end)."""

from __future__ import annotations

import numpy as np
import pytest

import rankfold


def test_every_pass_reports_rows_in_order(tmp_path):
    events = []
    x = np.random.default_rng(0).standard_normal((1000, 20))  # invented data
    rankfold.compress(x, tmp_path / "p.rfa", rank=3, batch_rows=300, progress=events.append)
    stages = [e["stage"] for e in events if e["done"]]
    assert stages == ["profile", "sketch", "select", "verify"]
    for stage in stages:
        mine = [e for e in events if e["stage"] == stage]
        assert [e["rows_done"] for e in mine] == [300, 600, 900, 1000, 1000]
        assert all(e["rows_per_second"] >= 0 and e["seconds"] >= 0 for e in mine)
        assert all(e["rows_total"] == (None if stage == "profile" else 1000) for e in mine)


def test_svd_has_no_select_pass(tmp_path):
    events = []
    x = np.random.default_rng(1).standard_normal((50, 6))
    rankfold.compress(x, tmp_path / "s.rfa", rank=2, method="svd", progress=events.append)
    assert [e["stage"] for e in events if e["done"]] == ["profile", "sketch", "verify"]


def test_progress_must_be_callable(tmp_path):
    with pytest.raises(rankfold.InvalidInputError, match="'progress' option of compress must be a callable"):
        rankfold.compress(np.ones((3, 3)), tmp_path / "x.rfa", progress="bar")
