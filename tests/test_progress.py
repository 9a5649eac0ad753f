"""Progress reports of the compress passes (common practice: one report per block, one per pass end)."""

from __future__ import annotations

import numpy as np
import pytest

import rankfold


def test_every_pass_reports_rows_in_order(tmp_path):
    events = []
    x = np.random.default_rng(0).standard_normal((1000, 20))  # invented data
    rankfold.compress(x, tmp_path / "p.rankfold", rank=3, batch_rows=300, link="optimal",
                      progress=events.append)
    stages = [e["stage"] for e in events if e["done"]]
    assert stages == ["profile", "select", "encode"]  # the profile pass also sketches
    for stage in stages:
        mine = [e for e in events if e["stage"] == stage]
        assert [e["rows_done"] for e in mine] == [300, 600, 900, 1000, 1000]
        assert all(e["rows_per_second"] >= 0 and e["seconds"] >= 0 for e in mine)
        assert all(e["rows_total"] == (None if stage == "profile" else 1000) for e in mine)


def test_svd_and_the_default_cx_link_have_no_select_pass(tmp_path):
    x = np.random.default_rng(1).standard_normal((50, 6))
    for name, options in (("svd", {"method": "svd"}), ("cx", {})):
        events = []
        rankfold.compress(x, tmp_path / f"{name}.rankfold", rank=2, progress=events.append, **options)
        assert [e["stage"] for e in events if e["done"]] == ["profile", "encode"]


def test_progress_must_be_callable(tmp_path):
    with pytest.raises(rankfold.InvalidInputError, match="'progress' option of compress must be a callable"):
        rankfold.compress(np.ones((3, 3)), tmp_path / "x.rankfold", progress="bar")
