"""Propagation conditions of a run (sound speed, wind, air), from a site file.

Light on purpose: ``tdoa check`` needs only this, not the estimators and solvers.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from locate.errors import OptionError

__all__ = ["Conditions", "conditions_for"]


@dataclass
class Conditions:
    """Propagation conditions of a run."""

    sound_speed_mps: float
    wind_mps: np.ndarray
    temperature_c: float
    relative_humidity: float
    wind_speed_mps: float
    wind_from_deg: float
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return {
            "sound_speed_mps": round(self.sound_speed_mps, 3),
            "temperature_c": self.temperature_c,
            "relative_humidity": self.relative_humidity,
            "wind_speed_mps": self.wind_speed_mps,
            "wind_from_deg": self.wind_from_deg,
        }


def conditions_for(site, sound_speed_mps=None) -> Conditions:
    """Sound speed and wind for a site (``sound_speed_mps`` overrides the air model)."""
    air = site.air
    c = float(sound_speed_mps) if sound_speed_mps is not None else air.sound_speed_mps()
    if not 250.0 <= c <= 400.0:
        raise OptionError(f"sound speed {c:g} m/s is not plausible for air (250-400 m/s)",
                          field="sound_speed_mps")
    return Conditions(c, air.wind_mps(), air.temperature_c, air.relative_humidity,
                      air.wind_speed_mps, air.wind_from_deg)
