"""One progress display for the long commands (envelope, check, simulate), from tqdm.

On a terminal it is tqdm's bar, redrawn in place: count, share, rate,
elapsed time and ETA. Anywhere else (a log file, a pipe, CI) there is no
bar: a plain line with the same figures (tqdm's own formatting) every
``line_every_s`` seconds and/or every ``line_every``-th item, and a last
one at the end, so that a log stays short. ``enabled=False`` (the commands'
``--no-progress``) shows nothing at all.

Also the local process pool the long commands share (``bounded_map``):
envelope campaigns and closed-loop batches.
"""

from __future__ import annotations

import math
import shutil
import sys
import time

from tqdm import tqdm

#: One format for the bar and for the plain lines, within 80 columns: the
#: figures of the line the envelope campaign printed before (count, share,
#: rate, elapsed, ETA).
BAR_FORMAT = ("{desc}: {percentage:3.0f}%|{bar:16}| {n_fmt}/{total_fmt} {rate_fmt} "
              "[elapsed {elapsed}, ETA {remaining}]")


class Progress:
    """Progress of ``total`` items of which ``initial`` are done already."""

    def __init__(self, total: int, desc: str, unit: str, initial: int = 0, stream=None,
                 enabled: bool = True, line_every_s: float | None = None,
                 line_every: int | None = None):
        self.stream = stream if stream is not None else sys.stderr
        self.total, self.n, self.initial = total, initial, initial
        self.desc, self.unit = desc, unit
        self.enabled = enabled
        self.tty = enabled and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.line_every_s, self.line_every = line_every_s, line_every
        self.t0 = time.monotonic()
        self.last_line = -math.inf
        self.bar = None
        if self.tty:
            # The window's size, or 80 x 24 where a terminal reports none (tqdm
            # would then draw nothing).
            size = shutil.get_terminal_size()
            self.bar = tqdm(total=total, initial=initial, desc=desc, unit=unit, file=self.stream,
                            bar_format=BAR_FORMAT, mininterval=0.2,
                            ncols=size.columns, nrows=size.lines,
                            leave=True)

    def line(self) -> str:
        """The figures as one plain line (ASCII bar)."""
        return tqdm.format_meter(self.n, self.total, time.monotonic() - self.t0, prefix=self.desc,
                                 unit=self.unit, ascii=True, bar_format=BAR_FORMAT,
                                 initial=self.initial)

    def update(self, n: int = 1) -> None:
        self.n += n
        if self.bar is not None:
            self.bar.update(n)
        elif self.enabled and self._line_due():
            self._print_line()

    def write(self, text: str) -> None:
        """A line of text that does not break the bar."""
        if self.bar is not None:
            self.bar.write(text, file=self.stream)
        else:
            print(text, file=self.stream, flush=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None
        elif self.enabled and self.last_printed != self.n:
            self._print_line()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    last_printed = None

    def _line_due(self) -> bool:
        if self.line_every and (self.n % self.line_every == 0 or self.n == self.total):
            return True
        return self.line_every_s is not None and time.monotonic() - self.last_line >= self.line_every_s

    def _print_line(self) -> None:
        self.last_line = time.monotonic()
        self.last_printed = self.n
        print(self.line(), file=self.stream, flush=True)


def bounded_map(fn, items, workers: int, initializer, initargs, in_flight: int):
    """Yield ``fn(item)`` for every item, in the order they finish, from
    ``workers`` spawned processes (a fresh interpreter each: nothing compiled
    or loaded here is shared with them), each set up by ``initializer(*initargs)``,
    with at most ``in_flight`` tasks submitted at once. Closing the generator
    early cancels what has not started."""
    import multiprocessing
    from collections import deque
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=initializer, initargs=initargs)
    queue, running = deque(items), set()
    try:
        while queue or running:
            while queue and len(running) < in_flight:
                running.add(pool.submit(fn, queue.popleft()))
            done, running = wait(running, return_when=FIRST_COMPLETED)
            for fut in done:
                yield fut.result()
    finally:
        pool.shutdown(wait=not running, cancel_futures=True)
