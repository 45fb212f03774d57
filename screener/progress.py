"""Stage-by-stage progress messages of a run (:class:`Progress`)."""

from __future__ import annotations

import time

__all__ = ["Progress"]


class Progress:
    """Stage-by-stage progress messages (to a callable such as ``print``).

    ``Progress(None)`` is silent.  ``stage(text)`` starts a stage; ``done()`` prints
    its duration; ``step(text)`` reports within a stage.
    """

    def __init__(self, echo=None, n_stages: int = 5):
        self.echo = echo
        self.n_stages = n_stages
        self.i = 0
        self.t0 = None
        self.timings: dict = {}
        self._name = None

    def stage(self, name: str):
        self.done()
        self.i += 1
        self._name = name
        self.t0 = time.perf_counter()
        if self.echo:
            self.echo(f"[{self.i}/{self.n_stages}] {name}")

    def step(self, text: str):
        if self.echo:
            self.echo(f"      {text}")

    def done(self):
        if self._name is not None and self.t0 is not None:
            dt = time.perf_counter() - self.t0
            self.timings[self._name] = round(dt, 3)
            if self.echo:
                self.echo(f"      done in {dt:.1f} s")
        self._name = None
