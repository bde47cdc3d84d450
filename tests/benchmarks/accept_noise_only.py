"""Acceptance measurement (run on demand): false events on noise-only recordings (issue 17).

Independent Gaussian noise on each of the 6 mics of the invented yard (tests/mixtures.py),
``--minutes`` long at 16 kHz, ``--recordings`` of them (different seeds), scanned by the
same streaming detector ``tdoa fix`` and ``tdoa events`` use (locate.workflows.fixing.scan_events:
whitened envelope, default threshold).  The noise is generated block by block from the
sample index, so a 10 min recording needs no file and little memory.  Prints the events
found per recording and the false-alarm rate per hour; ``--threshold`` repeats the count at
other thresholds (the rate that sets the default, docs/methods.md).

    python tests/benchmarks/accept_noise_only.py [--minutes 10] [--recordings 3]
        [--threshold 10 8 7]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from locate.workflows.fixing import scan_events  # noqa: E402
from tests.mixtures import RATE, YARD  # noqa: E402


class NoiseRecordings:
    """A reader of independent unit-variance noise per mic, the same samples on every read."""

    def __init__(self, n_mics, duration_s, rate_hz, seed):
        self.n_mics, self.sample_rate_hz = int(n_mics), float(rate_hz)
        self.start_s, self.stop_s = 0.0, float(duration_s)
        self.seed = int(seed)
        self.warnings = []
        self.deployment = None

    def _second(self, k):
        rng = np.random.default_rng([self.seed, int(k)])
        return rng.standard_normal((self.n_mics, int(self.sample_rate_hz)))

    def read(self, start_s, stop_s, out=None, scratch=None, gaps_ok=False):
        fs = self.sample_rate_hz
        a, b = int(round(start_s * fs)), int(round(stop_s * fs))
        n1 = int(fs)
        parts = [self._second(k) for k in range(a // n1, (b - 1) // n1 + 1)]
        x = np.concatenate(parts, axis=1)
        off = a - (a // n1) * n1
        return x[:, off:off + (b - a)], np.zeros(self.n_mics)



def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--recordings", type=int, default=3)
    ap.add_argument("--threshold", type=float, nargs="+", default=[10.0])
    args = ap.parse_args(argv)
    from locate.workflows.fixing import Conditions

    cond = Conditions(343.2, np.zeros(3), 20.0, 50.0, 0.0, 0.0)
    hours = args.minutes / 60.0 * args.recordings
    for thr in args.threshold:
        counts = []
        for r in range(args.recordings):
            rec = NoiseRecordings(len(YARD), args.minutes * 60.0, RATE, seed=r)
            events = scan_events(rec, YARD, cond, threshold_db=thr)
            counts.append(len(events))
        print(f"threshold {thr:g} dB: events per {args.minutes:g} min recording {counts}; "
              f"false-alarm rate {sum(counts) / hours:.2f} per hour")


if __name__ == "__main__":
    main()
