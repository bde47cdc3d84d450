"""Choosing which detected events to fix: ``--events all|N|T1,T2,...``.

* ``all`` - every detected event (the default);
* ``N`` - a whole number on its own: the N-th event in time order, counted from 1;
* ``T1,T2,...`` - times in seconds into the recording (a list, or one number with a decimal
  point such as ``125.0``): for each, the event nearest to it (0 s away when the time falls
  inside the event's span).
"""

from __future__ import annotations

import re

import numpy as np

from locate.errors import NothingFoundError, OptionError

__all__ = ["EventChoice", "parse_event_choice", "choose_events", "event_time_s"]

FAR_S = 5.0
"""A chosen time further than this from its nearest event gets a warning."""


class EventChoice:
    """Parsed ``--events`` value: ``kind`` is 'all', 'index' or 'times'; ``values`` a list."""

    def __init__(self, kind, values=()):
        self.kind = kind
        self.values = list(values)

    def __repr__(self):
        return f"EventChoice({self.kind!r}, {self.values!r})"


def parse_event_choice(text, *, option="events") -> EventChoice | None:
    """Parse an ``--events`` value (None stays None).

    Raises
    ------
    OptionError
        Anything but ``all``, a positive whole number or a list of non-negative times.
    """
    if text is None:
        return None
    s = str(text).strip()
    if s.lower() == "all":
        return EventChoice("all")
    if re.fullmatch(r"\+?\d+", s):
        n = int(s)
        if n < 1:
            raise OptionError(f"{text!r}: events are counted from 1", field=option)
        return EventChoice("index", [n])
    try:
        times = [float(p) for p in s.split(",") if p.strip()]
    except ValueError:
        raise OptionError(f"{text!r} is not all, an event number N or times T1,T2,... in "
                          "seconds", field=option) from None
    if not times or not all(np.isfinite(times)) or min(times) < 0:
        raise OptionError(f"{text!r}: give times in seconds (>= 0) separated by commas",
                          field=option)
    return EventChoice("times", times)


def event_time_s(event) -> float:
    """When an event was first heard (earliest onset over the mics), seconds."""
    onset = np.asarray(event.onset_s, dtype=float)
    return float(np.nanmin(onset)) if np.any(np.isfinite(onset)) else float(event.t_start_s)


def choose_events(events, choice: EventChoice | None, *, option="events"):
    """The events that ``choice`` selects, in time order, and notes for the user.

    Parameters
    ----------
    events : sequence of locate.signal.events.Event
        Detected events, in time order.
    choice : EventChoice or None
        None or 'all' keeps every event.

    Returns
    -------
    chosen : list of Event
    notes : list of str
        Times far from their nearest event, or several times giving the same event.

    Raises
    ------
    NothingFoundError
        The N-th event does not exist.
    """
    events = list(events)
    if choice is None or choice.kind == "all":
        return events, []
    if not events:
        return [], []
    if choice.kind == "index":
        n = choice.values[0]
        if n > len(events):
            raise NothingFoundError(f"event {n} was asked for but {len(events)} event(s) were "
                                    "found (see tdoa events)", field=option)
        return [events[n - 1]], []
    notes, picked = [], []
    starts = np.array([e.t_start_s for e in events])
    ends = np.array([e.t_end_s for e in events])
    for t in choice.values:
        gap = np.maximum(np.maximum(starts - t, t - ends), 0.0)
        k = int(np.argmin(gap))
        if gap[k] > FAR_S:
            notes.append(f"{option}: the event nearest to {t:g} s is {gap[k]:.1f} s away (heard at"
                         f" {event_time_s(events[k]):.3f} s)")
        if k in picked:
            notes.append(f"{option}: {t:g} s gives the same event as an earlier time (heard at "
                         f"{event_time_s(events[k]):.3f} s); it is fixed once")
        else:
            picked.append(k)
    return [events[k] for k in sorted(picked)], notes
