"""Progress of long work as events, and the time estimate a person reads from them.

Computation reports progress by calling a callback with a :class:`ProgressEvent`
(the stage, how much of it is done, the year just finished); it never prints. The
terminal renderer in ``cli.py`` passes the callback down, feeds each event to a
:class:`ProgressClock` for the elapsed and remaining time, and only formats.

Protocol
--------
Each stage opens with an event with ``done=0`` (so a renderer knows the total
before the first item ends), then one event per finished item with ``done``
counting up to ``total``. Items finish in any order when the years run in
parallel: ``year`` names the one just finished, ``done`` counts them all.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

STAGES = ("family", "years", "writing")
"""The stages, in the order a run meets them.

``family``: the variogram family choice (one variogram fit of every family per usable
year); ``years``: the per-year work (fit, outlier refit, kriging, cross-validation,
areas, conditional simulations, region rows); ``writing``: the outputs (emitted by the
run that writes them, not by the computation).
"""

STAGE_LABELS = {"family": "choosing the variogram family", "years": "mapping survey years",
                "writing": "writing outputs"}


@dataclass(frozen=True)
class ProgressEvent:
    """One step of progress.

    Attributes
    ----------
    stage
        One of :data:`STAGES`.
    done
        Items of the stage finished so far (0 when the stage opens).
    total
        Items in the stage.
    year
        The survey year just finished, or None (the opening event; a stage not counted
        in years).
    """

    stage: str
    done: int
    total: int
    year: int | None = None

    def __post_init__(self) -> None:
        """Refuse a stage outside :data:`STAGES` or a count outside ``0..total``."""
        if self.stage not in STAGES:
            raise ValueError(f"stage needs to be one of {', '.join(STAGES)}, got: {self.stage}")
        if not 0 <= self.done <= self.total:
            raise ValueError(f"done needs to be in 0..{self.total}, got: {self.done}")


ProgressCallback = Callable[[ProgressEvent], None]


def emit(progress: ProgressCallback | None, stage: str, done: int, total: int,
         year: int | None = None) -> None:
    """Call ``progress`` with one event, when there is a callback."""
    if progress is not None:
        progress(ProgressEvent(stage, done, total, year))


@dataclass(frozen=True)
class ProgressStatus:
    """What a renderer shows for the latest event.

    Attributes
    ----------
    event
        The latest event.
    elapsed_s
        Time since the first event of the run. [s]
    stage_elapsed_s
        Time since the stage opened. [s]
    remaining_s
        Estimated time to finish the stage: the stage's mean time per finished item
        times the items left; None before the first item finishes. [s]
    """

    event: ProgressEvent
    elapsed_s: float
    stage_elapsed_s: float
    remaining_s: float | None

    @property
    def label(self) -> str:
        """The stage in words, e.g. ``mapping survey years``."""
        return STAGE_LABELS[self.event.stage]


class ProgressClock:
    """Elapsed and remaining time from a stream of events; prints nothing.

    Parameters
    ----------
    clock
        Returns the current time in seconds (e.g. :func:`time.monotonic`); given, so
        the arithmetic is testable without waiting.

    Notes
    -----
    The remaining time assumes the items left take as long on average as those
    finished: with ``w`` parallel workers the first ``w`` years end close together
    and the estimate settles after them. It is for the current stage only, since
    how long the next stage takes is not known before it starts.
    """

    def __init__(self, clock: Callable[[], float]) -> None:
        self._clock = clock
        self._start: float | None = None
        self._stage: str | None = None
        self._stage_start = 0.0

    def update(self, event: ProgressEvent) -> ProgressStatus:
        """Take one event; return its status with the times."""
        now = self._clock()
        if self._start is None:
            self._start = now
        if event.stage != self._stage:
            self._stage = event.stage
            self._stage_start = now
        stage_elapsed = now - self._stage_start
        remaining = (stage_elapsed / event.done * (event.total - event.done)
                     if event.done > 0 else None)
        return ProgressStatus(event=event, elapsed_s=now - self._start,
                              stage_elapsed_s=stage_elapsed, remaining_s=remaining)
