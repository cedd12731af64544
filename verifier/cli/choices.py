"""Choices the command line reads from the registries, loaded only when a value is checked or help is shown.

``verifier hook commit-msg`` builds the whole parser on the commit hook's fast path, so a registry that
imports more than it should (the sandbox package) is read only when an option naming it is actually used.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator


class LazyChoices:
    """An argparse ``choices`` container whose items come from ``load`` the first time they are needed.
    Give the option a ``metavar``: argparse then reads the choices only to check a value or print help."""

    def __init__(self, load: Callable[[], tuple[str, ...]]) -> None:
        self._load = load
        self._items: tuple[str, ...] | None = None

    def _get(self) -> tuple[str, ...]:
        if self._items is None:
            self._items = self._load()
        return self._items

    def __contains__(self, value: object) -> bool:
        return value in self._get()

    def __iter__(self) -> Iterator[str]:
        return iter(self._get())

    def __len__(self) -> int:
        return len(self._get())


def _sandboxes() -> tuple[str, ...]:
    from verifier.sandbox import CHOICES

    return CHOICES


def _report_formats() -> tuple[str, ...]:
    from verifier.report import FORMATS

    return (*FORMATS, "all")


def _audit_formats() -> tuple[str, ...]:
    from verifier.audit.report import FORMATS

    return (*FORMATS, "all")


SANDBOXES = LazyChoices(_sandboxes)
REPORT_FORMATS = LazyChoices(_report_formats)
AUDIT_FORMATS = LazyChoices(_audit_formats)
