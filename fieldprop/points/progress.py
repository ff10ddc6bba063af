"""Progress of the points being computed: one reporter for every entrance.

On a terminal a tqdm bar; in a batch log (stderr not a terminal) a log line at
most every ``every_s`` seconds and one at the end: points done of the points
known so far (the total grows as the adaptive window's stages join), SCF
cycles, the time since the command started and an estimate of the time
left. Both count the same events, so a terminal and a batch log agree.
"""

from __future__ import annotations

import logging
import time

from tqdm import tqdm

logger = logging.getLogger(__name__)
#: One line per point done (its SCF cycles, time and path), shown with
#: ``--verbose`` only: the CLI sets this logger's level.
POINT_LOG = logging.getLogger("fieldprop.points.each")


def clock(seconds: float) -> str:
    """``h:mm:ss``."""
    seconds = int(round(seconds))
    return f"{seconds // 3600}:{seconds % 3600 // 60:02d}:{seconds % 60:02d}"


class Progress:
    """Counts points sent and done.

    ``bar``: draw a tqdm bar (a terminal); ``every_s``: else log a line at
    most that often (None: silent). ``label`` names what is counted.
    """

    def __init__(self, bar: bool = False, every_s: float | None = None,
                 label: str = "field points", since_s: float = 0.0):
        self.label = label
        self.total = self.done = self.cycles = 0
        # Elapsed counts from the command's start (``since_s`` seconds ago:
        # a geometry optimisation before the points, say), not from here.
        self.last = time.monotonic()
        self.start = self.last - since_s
        self._bar = tqdm(total=0, desc=label, unit="pt", leave=False) if bar else None
        self.every_s = None if bar else every_s

    def grow(self, n: int) -> None:
        """``n`` more points to compute (a stage, a job joined)."""
        if n <= 0:
            return
        self.total += n
        if self._bar is not None:
            self._bar.total = self.total
            self._bar.refresh()

    def shrink(self, n: int) -> None:
        """``n`` points dropped before they were sent (their job failed)."""
        self.total = max(self.done, self.total - n)
        if self._bar is not None:
            self._bar.total = self.total
            self._bar.refresh()

    def update(self, outcome) -> None:
        """One point done (a PointRecord or a PointFailure)."""
        self.done += 1
        self.cycles += getattr(outcome, "scf_cycles", 0)
        if POINT_LOG.isEnabledFor(logging.INFO):
            attempts = getattr(outcome, "attempts", None)
            POINT_LOG.info("point %s: %s, %.3g s%s", outcome.point.label,
                           f"{outcome.scf_cycles} SCF cycles" if attempts is not None
                           else "failed", getattr(outcome, "wall_time_s", 0.0),
                           f" ({', '.join(attempts)}; orbital gradient "
                           f"{outcome.gradient_norm:.1e})" if attempts is not None else "")
        if self._bar is not None:
            self._bar.update()
            return
        if self.every_s is None:
            return
        now = time.monotonic()
        if now - self.last >= self.every_s or self.done == self.total:
            self.last = now
            self.log(now)

    def log(self, now: float | None = None) -> None:
        now = time.monotonic() if now is None else now
        elapsed = now - self.start
        left = elapsed / self.done * (self.total - self.done) if self.done else 0.0
        logger.info("%d/%d %s, %d SCF cycles, %s elapsed, ~%s left", self.done, self.total,
                    self.label, self.cycles, clock(elapsed), clock(left))

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None
