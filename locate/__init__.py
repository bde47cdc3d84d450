"""tdoa - find where a sound came from.

The public Python API (docs/api.md); every name is loaded on first use, so ``import locate`` is
light and pulls in neither the command line (click) nor plotting (matplotlib):

* :func:`load_site` - read and validate a site file
* :func:`open_recordings` - the recordings of a site on one time base
* :func:`estimate_delays` - time differences of arrival (GCC-PHAT) with their uncertainty
* :func:`locate` - fix a stationary source, as ``tdoa fix``
* :func:`locate_sources` - every source standing out of a span, as ``tdoa fix --sources``
* :func:`detect_events` - detected events, as ``tdoa events``
* :func:`sound_levels` - source sound power and receiver levels, as ``tdoa level``
* :func:`plan` - expected accuracy and the best next mic, as ``tdoa plan``
* :func:`read_result`, :func:`write_result` - result documents (``tdoa-result/1``)
* :func:`sound_speed_mps` - speed of sound in air (Cramer 1993)
* :func:`demo_dir` - the bundled demo recordings

The package's rooms (subpackages) are listed in docs/architecture.md.
"""

__version__ = "0.1.0"

__all__ = ["load_site", "open_recordings", "estimate_delays", "locate", "locate_sources",
           "detect_events", "sound_levels", "plan", "read_result", "write_result",
           "sound_speed_mps",
           "demo_dir"]


def __getattr__(name):
    if name in __all__:
        from locate import api

        return getattr(api, name)
    raise AttributeError(f"module 'locate' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)
