"""The methods paragraph of a report: the published methods the given results rest on.

Only methods that the results actually used are named: delay estimation and the stationary
locator for fixes, the retarded-time path fit for tracks, the level chain (air absorption,
spreading, A-weighting, barrier) for level results, and first-order propagation for fixes
with an uncertainty budget.  Each method maps to a full reference in :data:`REFERENCES`.
"""

from __future__ import annotations

__all__ = ["REFERENCES", "methods_used", "methods_section"]

REFERENCES = {
    "knapp1976": "Knapp, C. H. & Carter, G. C. (1976). The generalized correlation method for "
                 "estimation of time delay. IEEE Transactions on Acoustics, Speech, and Signal "
                 "Processing 24(4), 320–327.",
    "carter1987": "Carter, G. C. (1987). Coherence and time delay estimation. Proceedings of "
                  "the IEEE 75(2), 236–255.",
    "chan1994": "Chan, Y. T. & Ho, K. C. (1994). A simple and efficient estimator for "
                "hyperbolic location. IEEE Transactions on Signal Processing 42(8), 1905–1915.",
    "foy1976": "Foy, W. H. (1976). Position-location solutions by Taylor-series estimation. "
               "IEEE Transactions on Aerospace and Electronic Systems 12(2), 187–194.",
    "cramer1993": "Cramer, O. (1993). The variation of the specific heat ratio and the speed "
                  "of sound in air with temperature, pressure, humidity, and CO2 "
                  "concentration. Journal of the Acoustical Society of America 93(5), "
                  "2510–2516.",
    "iso9613_1": "ISO 9613-1:1993. Acoustics — Attenuation of sound during propagation "
                 "outdoors — Part 1: Calculation of the absorption of sound by the atmosphere.",
    "iso9613_2": "ISO 9613-2:1996. Acoustics — Attenuation of sound during propagation "
                 "outdoors — Part 2: General method of calculation.",
    "iec61672": "IEC 61672-1:2013. Electroacoustics — Sound level meters — Part 1: "
                "Specifications (A-weighting).",
    "maekawa1968": "Maekawa, Z. (1968). Noise reduction by screens. Applied Acoustics 1, "
                   "157–173.",
    "gum2008": "JCGM 100:2008. Evaluation of measurement data — Guide to the expression of "
               "uncertainty in measurement (GUM).",
}


def _barrier_used(result):
    levels = result.get("levels") if isinstance(result.get("levels"), list) else [result]
    for lev in levels:
        for r in lev.get("receivers") or []:
            if any(v is not None and v > 0 for v in r.get("barrier_db") or []):
                return True
    return False


def methods_used(site, results):
    """Keys of :data:`REFERENCES` used by ``results``, in citation order."""
    kinds = {r.get("kind") for r in results}
    used = []
    if kinds & {"fix", "track"}:
        used += ["knapp1976"]
    if "fix" in kinds:
        used += ["carter1987", "chan1994", "foy1976"]
    elif "track" in kinds:
        used += ["foy1976"]
    if site.air.sound_speed_override_mps is None and kinds & {"fix", "track", "level"}:
        used += ["cramer1993"]
    if "level" in kinds:
        used += ["iso9613_1", "iso9613_2", "iec61672"]
        if any(_barrier_used(r) for r in results if r.get("kind") == "level"):
            used += ["maekawa1968"]
    if any(isinstance(f.get("uncertainty_budget"), dict)
           for r in results for f in r.get("fixes") or []):
        used += ["gum2008"]
    return used


def methods_section(site, results):
    """Paragraphs (plain text) and the numbered references they cite.

    Returns
    -------
    dict
        ``paragraphs`` (list of str) and ``references`` (list of str), cited as [n].
    """
    used = methods_used(site, results)
    n = {k: i + 1 for i, k in enumerate(used)}

    def cite(*keys):
        return "[" + ", ".join(str(n[k]) for k in keys if k in n) + "]"

    kinds = {r.get("kind") for r in results}
    paras = []
    if "cramer1993" in n:
        paras.append("The speed of sound was worked out from the air temperature, humidity and "
                     f"pressure recorded for the survey {cite('cramer1993')}; a uniform wind, "
                     "where given, adds to the speed along each path.")
    elif kinds & {"fix", "track"}:
        paras.append("The speed of sound was set directly in the site file.")
    if "fix" in kinds:
        paras.append(
            "For each sound, the difference in arrival time between every pair of microphones "
            "was measured by generalized cross-correlation with phase-transform weighting "
            f"(GCC-PHAT) {cite('knapp1976')}, refined with maximum-likelihood "
            f"(Hannan–Thomson) coherence weighting; each delay's uncertainty follows the "
            f"coherence bound {cite('carter1987')}. Pair delays that do not close with the "
            "others were set aside. The source position was started from a closed-form "
            f"solution of the range-difference equations {cite('chan1994')} and refined by "
            f"weighted least squares (Gauss–Newton / Taylor series) {cite('foy1976')}. A "
            "chi-square test of the residuals checks the fit; when it fails, the microphone "
            "whose removal restores agreement is rejected and the fit repeated. The 95 % "
            "ellipse is the chi-square (2 degrees of freedom) region of the fit covariance.")
    if "track" in kinds:
        paras.append(
            "For a moving source, arrival-time differences were measured in short windows by "
            f"cross-correlation {cite('knapp1976')}, allowing for the time sound takes to "
            "travel: each window's sound left the source earlier than it was heard (retarded "
            "time). A path at constant velocity (or in straight segments) was fitted to all "
            f"windows at once by least squares {cite('foy1976')}; heading and speed "
            "uncertainties come from the fit covariance by first-order propagation.")
    if "level" in kinds:
        text = ("Sound power levels per octave band were worked back from the levels received "
                "at each calibrated microphone, allowing for spherical spreading "
                f"{cite('iso9613_2')} and atmospheric absorption {cite('iso9613_1')}; "
                f"A-weighted totals use the standard A-weighting {cite('iec61672')}. Levels at "
                "the named receivers were predicted the same way forward")
        if "maekawa1968" in n:
            text += (", with a screening estimate for barriers from the Fresnel number "
                     f"{cite('maekawa1968')}")
        paras.append(text + ". Ground effect, wind and temperature gradients, reflections and "
                            "source directivity are not modelled.")
    if "gum2008" in n:
        paras.append(
            "Where the survey uncertainties (microphone positions, clocks, air temperature, "
            "wind) were declared, they were propagated to first order into each ellipse, and "
            f"the budget apportions the horizontal variance among them {cite('gum2008')}.")
    return {"paragraphs": paras, "references": [REFERENCES[k] for k in used]}
