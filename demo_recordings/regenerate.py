"""Regenerate the demo recordings from the project's simulator (never hand-edit the data).

Invented scenarios:

* ``yard.toml`` / ``yard.flac`` - "Brackwater Lane depot": residents of a lane report night-time
  bangs from a goods yard.  Five recorders stand around the yard; three bangs come from
  different spots (a dropped skip lid, a slammed trailer door, a pallet hitting the ground),
  with a ground reflection, at 6 degC and 80 % RH.
* ``lane.toml`` / ``lane.flac`` - "Ostry Road": a delivery van passes along the road beside six
  recorders at 20 m/s (broadband engine/tyre noise with an engine tone).

Run:  python demo_recordings/regenerate.py   (writes next to this script; a few MB in all)
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from locate.io.audio import write_audio
from locate.synth import Emission, StraightPath, Waveform, simulate_events, simulate_moving

HERE = Path(__file__).resolve().parent
RATE_HZ = 24000.0
TEMPERATURE_C, HUMIDITY = 6.0, 80.0

YARD_MICS = {
    "NW-gate": (-4.0, 41.0, 1.5), "NE-shed": (47.0, 44.0, 1.6), "E-fence": (55.0, 6.0, 1.4),
    "SW-post": (-6.0, -3.0, 1.5), "mid-lamp": (22.0, 20.0, 2.5),
}
YARD_BANGS = [((18.0, 31.0, 1.0), 1.20, "impulse", (150.0, 5000.0), 0.06, 6.0),
              ((36.0, 9.0, 1.0), 3.70, "impulse", (120.0, 4500.0), 0.10, 9.0),
              ((70.0, 58.0, 1.0), 6.30, "impulse", (100.0, 4000.0), 0.08, 14.0)]

LANE_MICS = {
    "L1": (0.0, 0.0, 1.5), "L2": (30.0, 4.0, 1.5), "L3": (62.0, -2.0, 1.5),
    "L4": (10.0, 28.0, 1.5), "L5": (45.0, 30.0, 1.5), "L6": (72.0, 22.0, 1.5),
}


def _site_text(title, recording, mics, extra=""):
    lines = [f'title = "{title}"', 'coordinates = "local"', "",
             "[air]", f"temperature_c = {TEMPERATURE_C}", f"relative_humidity = {HUMIDITY}",
             "pressure_kpa = 101.3", "", "[recording]", f'file = "{recording}"', ""]
    for k, (name, (x, y, z)) in enumerate(mics.items(), 1):
        lines += ["[[mics]]", f'name = "{name}"', f"x = {x}", f"y = {y}", f"z = {z}",
                  f"channel = {k}", "full_scale_db_spl = 120.0", ""]
    return "\n".join(lines) + extra


def _to_full_scale(pa, full_scale_db_spl=120.0):
    """Pa -> recorder units, 0 dBFS sine = full_scale_db_spl (peak 1.0)."""
    p_fs_rms = 20e-6 * 10 ** (full_scale_db_spl / 20)
    return pa / (p_fs_rms * np.sqrt(2))


def make_yard(rng):
    mics = np.array(list(YARD_MICS.values()))
    events = [Emission(np.array(p), t, Waveform(kind=k, band_hz=b, duration_s=d,
                                                 rms_pa_at_1m=a))
              for p, t, k, b, d, a in YARD_BANGS]
    sim = simulate_events(mics, events, sample_rate_hz=RATE_HZ, duration_s=8.0,
                          temperature_c=TEMPERATURE_C, relative_humidity=HUMIDITY,
                          ground_reflection=0.8, noise_rms=0.002, rng=rng)
    write_audio(HERE / "yard.flac", _to_full_scale(sim.signals), RATE_HZ, subtype="PCM_16")
    extra = "\n".join([
        "[survey]            # positions taped from the corner post",
        "position_sd_m = 0.05", "",
        "[[receivers]]", 'name = "No. 14 Brackwater Lane"', "x = 95.0", "y = 70.0", "z = 4.0", "",
        "[[barriers]]", 'label = "yard wall"', "line = [[60.0, -10.0], [80.0, 65.0]]",
        "height_m = 3.0", "",
        "[sketch]",
        'shapes = [ { label = "loading shed", outline = [[30.0, 36.0], [50.0, 36.0], '
        "[50.0, 50.0], [30.0, 50.0]] },",
        '           { label = "office", outline = [[0.0, 10.0], [10.0, 10.0], [10.0, 18.0], '
        "[0.0, 18.0]] } ]", "",
        "[report]            # the report's title block (invented)",
        'client = "Brackwater Residents\' Association"',
        'site_address = "Brackwater Lane depot, Brackwater"',
        'job_reference = "BW-2026-014"', 'author = "A. Surveyor"',
        'survey_dates = "2026-11-18 to 2026-11-19"', 'revision = "A"', ""])
    (HERE / "yard.toml").write_text(_site_text("Brackwater Lane depot - night bangs",
                                               "yard.flac", YARD_MICS, extra))
    return sim


def make_lane(rng):
    mics = np.array(list(LANE_MICS.values()))
    path = StraightPath(start_m=np.array([-60.0, -30.0, 0.8]),
                        velocity_mps=np.array([20.0, 0.0, 0.0]), t0_s=0.0)
    wave = (Waveform(kind="noise", band_hz=(100.0, 4000.0), rms_pa_at_1m=2.0),
            Waveform(kind="tone", fundamental_hz=110.0, harmonics=(1.0, 0.6, 0.3),
                     rms_pa_at_1m=0.8))
    sim = simulate_moving(mics, path, wave, t_start_s=0.0, t_stop_s=8.0,
                          sample_rate_hz=RATE_HZ, duration_s=8.5,
                          temperature_c=TEMPERATURE_C, relative_humidity=HUMIDITY,
                          noise_rms=0.002, rng=rng)
    write_audio(HERE / "lane.flac", _to_full_scale(sim.signals), RATE_HZ, subtype="PCM_16")
    (HERE / "lane.toml").write_text(_site_text("Ostry Road - passing van", "lane.flac",
                                               LANE_MICS))
    return sim


if __name__ == "__main__":
    rng = np.random.default_rng(20261202)
    make_yard(rng)
    make_lane(rng)
    for f in sorted(HERE.glob("*.flac")):
        print(f"{f.name}: {f.stat().st_size / 1e6:.2f} MB")
