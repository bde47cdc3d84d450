"""What the commands print, read as a client or a new user would: the event's own number,
plain words instead of the tool's internal names, one ± and µs style, a closing summary."""

from __future__ import annotations

import json
import re

import numpy as np

from locate.cli.common import run_summary
from locate.workflows.demo_data import demo_dir
from tests.cli_helpers import run

# Words the tool used to print that a practitioner does not use (issue 22), and ASCII
# stand-ins for ± and µs
JARGON = re.compile(r"heard-from vs is-now|mic spread|above bg|\bbudget:|Birge|\+-|\+/-|"
                    r"\d us\b|\bdeg\b", re.IGNORECASE)


def test_events_choice_keeps_the_events_own_number(tmp_path):
    site = demo_dir() / "yard.toml"
    code, out, err = run(["fix", site, "--events", "2", "--json", tmp_path / "f.json"])
    assert code == 0, err
    # the demo's second bang (demo_recordings/regenerate.py) is heard at 3.75 s
    assert re.search(r"^#2 heard at 3\.7\d\d s", out, re.MULTILINE), out
    assert "#1 " not in out
    doc = json.loads((tmp_path / "f.json").read_text())
    assert [f["event"] for f in doc["fixes"]] == [2]
    assert not JARGON.search(out + err), JARGON.findall(out + err)


def test_a_span_fix_says_span_not_heard_at(tmp_path):
    site = demo_dir() / "yard.toml"
    code, out, err = run(["fix", site, "--from", "1.0", "--to", "1.6"])
    assert code == 0, err
    assert re.search(r"^#1 span 1\.000\.\.1\.600 s", out, re.MULTILINE), out


def test_every_command_says_where_it_wrote_and_uses_plain_words(tmp_path):
    site = demo_dir() / "yard.toml"
    jobs = [["events", site, "--json", tmp_path / "e.json"],
            ["fix", site, "--json", tmp_path / "f.json"],
            ["level", site, tmp_path / "f.json", "--json", tmp_path / "l.json"],
            ["plan", site, "--json", tmp_path / "p.json"]]
    for argv in jobs:
        code, out, err = run(argv)
        assert code == 0, (argv, err)
        assert f"Result written to {argv[-1]}" in out, (argv[0], out)
        assert not JARGON.search(out + err), (argv[0], JARGON.findall(out + err))


def test_the_closing_summary_counts_fixes_refusals_warnings_and_the_median_ellipse():
    majors = [0.1, 0.3, 0.2, 5.0]
    result = {"fixes": [{"ellipse95": {"semi_major_m": a}, "warnings": ["w"] if a > 1 else []}
                        for a in majors], "spans_without_fix": 3}
    line = run_summary(result)
    # median by numpy (reference), formatted as the tool formats lengths
    assert f"{float(np.median(majors)) * 100:.0f} cm" in line
    assert "4 fix(es), 3 span(s) without a fix, 1 fix(es) with a warning" in line
