"""Events over a steady sound (issue 17): one event per bang, onsets right, bang's own delays.

Truth: the exact simulator's arrival times and source positions (locate.synth, tests/mixtures).
"""

import numpy as np

from locate.io.audio import open_recordings
from locate.io.site import load_site
from locate.workflows.locating import list_events, locate_recordings
from tests.cli_helpers import write_site
from tests.mixtures import HUM, RATE, YARD, mixture


def test_bangs_under_a_hum_are_found_once_with_their_onsets_and_fixed(tmp_path):
    rng = np.random.default_rng(5)
    bangs = [((20.0, 15.0, 1.0), 1.5), ((35.0, 30.0, 1.0), 3.5)]
    sig, info = mixture(rng, YARD, bangs=bangs, steadies=[((140.0, 60.0, 1.5), HUM)],
                        duration_s=5.0, steady_db=(10.0,), snr_db=15.0)
    site = load_site(write_site(tmp_path, YARD, sig, RATE, temperature_c=20.0, humidity=50.0))
    rec = open_recordings(site)
    events = list_events(site, rec)["events"]
    first = info["arrivals_s"].min(axis=1)
    assert len(events) == 2  # one event per bang, no doubles
    for ev, t in zip(events, first):
        assert abs(ev["t_s"] - t) < 0.01  # simulator arrival, within two 5 ms frames
    fixes = locate_recordings(site, rec, source_z_m=1.0)["fixes"]
    assert len(fixes) == 2
    for f, (pos, _) in zip(fixes, bangs):
        assert np.hypot(*(np.array(f["position_m"][:2]) - pos[:2])) < 0.5
