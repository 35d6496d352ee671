"""One progress interface for library code; the CLI plugs in bars, tests plug in nothing."""
from __future__ import annotations

from typing import Protocol


class Progress(Protocol):
    def start(self, name: str, total: int) -> None: ...
    def advance(self, n: int = 1) -> None: ...
    def finish(self) -> None: ...


class NullProgress:
    def start(self, name: str, total: int) -> None:
        pass

    def advance(self, n: int = 1) -> None:
        pass

    def finish(self) -> None:
        pass


class BarProgress:
    """tqdm bars on stderr: count, rate and time left for each stage."""

    def __init__(self) -> None:
        self._bar = None

    def start(self, name: str, total: int) -> None:
        from tqdm import tqdm

        self.finish()
        self._bar = tqdm(total=total, desc=f"{name:>15}", unit="img", dynamic_ncols=True, leave=True)

    def advance(self, n: int = 1) -> None:
        if self._bar is not None:
            self._bar.update(n)

    def finish(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None
