"""Progress of a long run on stderr: a tqdm bar (count, rate, time left), shown only on a
terminal unless forced, and cleared when the run ends."""

from __future__ import annotations

import sys

from tqdm import tqdm

# tqdm's own bar and meters, laid out as count/total, rate and time left
_WITH_TOTAL = "[{bar:24}] {n:,}/{total:,}{unit} {percentage:5.1f}% | {rate_fmt} | ETA {remaining}"
_WITHOUT_TOTAL = "{n:,}{unit} | {rate_fmt} | {elapsed}"


class Progress:
    """Counts ``unit`` (rows, partitions) done out of ``total`` (None: unknown).

    ``stream``: where the bar goes (default stderr); ``enabled``: None shows it only when
    ``stream`` is a terminal, True or False force it on or off.
    """

    def __init__(self, total: int | None, stream=None, enabled: bool | None = None,
                 unit: str = "rows"):
        self.total = total
        self.done = 0
        self._bar = tqdm(total=total, file=stream if stream is not None else sys.stderr,
                         disable=None if enabled is None else not enabled,
                         unit=f" {unit}", unit_scale=True, leave=False, dynamic_ncols=True,
                         bar_format=_WITH_TOTAL if total else _WITHOUT_TOTAL)

    def update(self, n: int) -> None:
        self.done += n
        self._bar.update(n)
        if self.total and self.done >= self.total:
            self._bar.refresh()      # the last count, even within tqdm's redraw interval

    def close(self) -> None:
        self._bar.close()
