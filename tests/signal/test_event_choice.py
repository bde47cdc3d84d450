"""``tdoa fix --events all|N|T1,T2,...``: choosing which detected events to fix."""

import json

import numpy as np
import pytest

from locate import synth
from locate.errors import NothingFoundError, OptionError
from locate.signal.event_choice import choose_events, parse_event_choice
from locate.signal.events import Event
from tests.field_scene import MICS7_M, burst, run_cli, site_dict, write_multichannel, write_site

TIMES = (0.4, 1.6, 2.9, 4.1)  # emission times of four bursts, s
SOURCES = [(8.0, 30.0), (33.0, 6.0), (22.0, 50.0), (45.0, 40.0)]


def _event(t0, t1):
    return Event(t_start_s=t0, t_end_s=t1, onset_s=np.array([t0 + 0.05, np.nan]), level_db=20.0,
                 n_mics=1, duration_s=t1 - t0)


EVENTS = [_event(1.0, 1.4), _event(5.0, 5.3), _event(9.0, 9.6)]


@pytest.mark.parametrize("text, kind, values", [
    ("all", "all", []), ("ALL", "all", []), ("2", "index", [2]), ("12.0", "times", [12.0]),
    ("3,5.5", "times", [3.0, 5.5]), (" 1.5 , 9 ", "times", [1.5, 9.0])])
def test_event_choice_is_parsed(text, kind, values):
    c = parse_event_choice(text)
    assert (c.kind, c.values) == (kind, values)


@pytest.mark.parametrize("text", ["0", "first", "1,,x", "-3.0", "nan"])
def test_bad_event_choice_names_the_parameter(text):
    with pytest.raises(OptionError) as err:
        parse_event_choice(text)
    assert err.value.field == "events"  # the CLI says --events (locate.cli.OPTION_OF)


def test_the_nth_and_the_nearest_events_are_chosen():
    assert choose_events(EVENTS, parse_event_choice("2"))[0] == [EVENTS[1]]
    chosen, notes = choose_events(EVENTS, parse_event_choice("9.3,1.45,30"))
    assert chosen == [EVENTS[0], EVENTS[2]] and len(notes) == 2  # 30 s is far; 9.3 twice
    assert any("20.4 s away" in n for n in notes)
    with pytest.raises(NothingFoundError, match="3 event"):
        choose_events(EVENTS, parse_event_choice("4"))


@pytest.fixture(scope="module")
def bursts(tmp_path_factory):
    folder = tmp_path_factory.mktemp("bursts")
    events = [synth.Emission(np.array([x, y, 1.0]), t, burst())
              for (x, y), t in zip(SOURCES, TIMES, strict=True)]
    sim = synth.simulate_events(MICS7_M, events, sample_rate_hz=48000.0, duration_s=5.0,
                                temperature_c=15.0, relative_humidity=60.0, snr_db=15.0,
                                rng=np.random.default_rng(9))
    write_multichannel(folder / "rec.wav", sim)
    return write_site(folder / "site.toml", site_dict(MICS7_M, recording="rec.wav"))


def _fix_positions(site, tmp_path, choice):
    out = tmp_path / "f.json"
    code, _, stderr = run_cli(["fix", site, "--source-z", "1", "--events", choice, "--json", out])
    assert code == 0, stderr
    return [f["position_m"][:2] for f in json.loads(out.read_text())["fixes"]]


def test_fix_takes_the_chosen_events_only(bursts, tmp_path):
    assert len(_fix_positions(bursts, tmp_path, "all")) == 4
    (p,) = _fix_positions(bursts, tmp_path, "3")
    assert np.linalg.norm(np.array(p) - SOURCES[2]) < 0.05
    got = _fix_positions(bursts, tmp_path, "4.2,0.5")
    assert len(got) == 2
    assert np.linalg.norm(np.array(got[0]) - SOURCES[0]) < 0.05
    assert np.linalg.norm(np.array(got[1]) - SOURCES[3]) < 0.05


def test_events_with_a_span_or_past_the_last_event_are_clear_errors(bursts):
    code, _, stderr = run_cli(["fix", bursts, "--events", "2", "--from", "0", "--to", "1"])
    assert code == 2 and "--events" in stderr and stderr.count("\n") == 1
    code, _, stderr = run_cli(["fix", bursts, "--events", "9"])
    assert code == 1 and "4 event(s) were found" in stderr
