"""The public names are pinned: adding, removing or renaming one must be a decision, made here
and in the README, not a side effect. Every public name resolves, and the errors re-exported by
``rankfold`` are exactly the one hierarchy of ``rankfold.udfs.errors``."""

from __future__ import annotations

import re
from pathlib import Path

import rankfold
import rankfold.udfs
import rankfold.udfs.errors
import rankfold.udfs.sql

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")

CLIENT_NAMES = ["compress", "open", "query", "verify", "write_report", "Archive", "Cell", "Keys",
                "__version__"]
ERROR_NAMES = ["RankfoldError", "InvalidInputError", "EmptySourceError", "NoNumericColumnsError",
               "RankTooLargeError", "UnknownOptionError", "UnknownColumnError", "RowOutOfRangeError",
               "ArchiveExistsError", "ArchiveNotFoundError", "CorruptArchiveError",
               "UnsupportedVersionError", "SourceChangedError"]


def test_rankfold_all_is_pinned():
    assert rankfold.__all__ == CLIENT_NAMES + rankfold.udfs.errors.__all__
    for name in rankfold.__all__:
        assert getattr(rankfold, name) is not None, name


def test_the_error_hierarchy_is_pinned_and_rooted():
    # new errors extend this list (and the tree in the errors module's docstring)
    assert set(ERROR_NAMES) <= set(rankfold.udfs.errors.__all__)
    doc = rankfold.udfs.errors.__doc__
    for name in rankfold.udfs.errors.__all__:
        error = getattr(rankfold, name)
        assert error is getattr(rankfold.udfs.errors, name)
        assert issubclass(error, rankfold.RankfoldError)
        assert re.search(rf"\b{name}\b", doc), f"{name} is missing from the tree in errors.py"


def test_udfs_public_names_are_pinned():
    assert rankfold.udfs.__all__ == ["register", "__version__"]
    assert rankfold.udfs.sql.__all__ == ["register", "FUNCTIONS"]
    assert rankfold.udfs.__version__ == rankfold.__version__


def test_the_readme_shows_the_client_functions():
    for name in ("compress", "open", "query", "verify", "write_report"):
        assert f"rankfold.{name}" in README, name
