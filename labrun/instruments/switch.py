"""Optical switch adapter: path 1 = spool output to OSA, path 2 = spool input tap."""

from __future__ import annotations

from labrun.instruments.base import Adapter


class SwitchAdapter(Adapter):
    """The optional switch in front of the OSA."""

    kind = "switch"

    def set_path(self, n: int) -> None:
        self.apply("set_path", n)

    def path(self) -> int:
        return self.read("read_path")
