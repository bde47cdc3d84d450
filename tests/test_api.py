"""The public Python API (locate.api, docs/api.md): equal to the command line, and documented
by examples that run."""

from __future__ import annotations

import doctest
import json
from pathlib import Path

import numpy as np
import pytest

import locate
from tests.cli_helpers import run

DOCS = Path(__file__).resolve().parents[1] / "docs"


def _same(a, b, path="result"):
    """Recursive equality: numbers to 1e-12 relative (the same code path), the rest exact."""
    if isinstance(a, dict):
        assert set(a) == set(b), f"{path}: keys {sorted(set(a) ^ set(b))}"
        for k in a:
            _same(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list | tuple):
        assert len(a) == len(b), f"{path}: lengths {len(a)} != {len(b)}"
        for k, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{path}[{k}]")
    elif isinstance(a, float) or isinstance(b, float):
        if a is None or b is None:
            assert a is b, path
        else:
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=0, err_msg=path)
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"


def test_the_api_fix_equals_the_command_line_fix_on_the_demo(tmp_path):
    site_path = locate.demo_dir() / "yard.toml"
    out = tmp_path / "fix.json"
    code, _, err = run(["-q", "fix", site_path, "--source-z", "1", "--json", out])
    assert code == 0, err
    cli_doc = json.loads(out.read_text())
    api_doc = json.loads(json.dumps(locate.locate(site_path, source_z_m=1.0),
                                    default=lambda o: o.tolist()))
    # the same ellipses, uncertainty budget and warnings (JSON round trip on both sides)
    from locate.results.documents import jsonable
    _same(json.loads(json.dumps(jsonable(api_doc))), cli_doc)
    assert cli_doc["fixes"] and all("uncertainty_budget" in f for f in cli_doc["fixes"])


def test_the_api_events_equal_the_command_line_events(tmp_path):
    site_path = locate.demo_dir() / "yard.toml"
    out = tmp_path / "events.json"
    code, _, err = run(["-q", "events", site_path, "--json", out])
    assert code == 0, err
    from locate.results.documents import jsonable
    _same(json.loads(json.dumps(jsonable(locate.detect_events(site_path)))),
          json.loads(out.read_text()))


def test_import_locate_lists_its_api_and_loads_it_on_use():
    assert set(locate.__all__) <= set(dir(locate))
    for name in locate.__all__:
        assert callable(getattr(locate, name)), name
    with pytest.raises(AttributeError):
        locate.no_such_function  # noqa: B018


@pytest.mark.parametrize("target", ["docs/api.md", "locate/api.py"])
def test_the_documented_examples_run(target):
    root = DOCS.parent
    if target.endswith(".md"):
        res = doctest.testfile(str(root / target), module_relative=False,
                               optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    else:
        from locate import api
        res = doctest.testmod(api, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert res.attempted > 0 and res.failed == 0, res


def test_the_api_levels_equal_the_command_line_levels(tmp_path):
    # the same workflow (locate.workflows.level.levels_of_result) behind both
    site_path = locate.demo_dir() / "yard.toml"
    fix_json, lev_json = tmp_path / "fix.json", tmp_path / "lev.json"
    assert run(["-q", "fix", site_path, "--source-z", "1", "--json", fix_json])[0] == 0
    code, _, err = run(["-q", "level", site_path, fix_json, "--fix", 1, "--json", lev_json])
    assert code == 0, err
    from locate.results.documents import jsonable
    api_doc = locate.sound_levels(site_path, fix_json, fix_no=1)
    _same(json.loads(json.dumps(jsonable(api_doc))), json.loads(lev_json.read_text()))
    assert api_doc["levels"][0]["fix"] == 1
    with pytest.raises(locate.errors.OptionError, match="fix 9"):
        locate.sound_levels(site_path, fix_json, fix_no=9)
