"""Progress bars (tqdm, optional) for long passes and iterated fits."""

from __future__ import annotations

import sys
from collections.abc import Callable
from typing import Any

from .errors import InvalidOptionError, MissingDependencyError

__all__ = ["progress_hook"]


def _wanted(progress: bool | None) -> bool:
    if progress is None:
        stream = sys.stderr
        return bool(getattr(stream, "isatty", lambda: False)())
    if not isinstance(progress, bool):
        raise InvalidOptionError(f"progress must be True, False or None (automatic), got {progress!r}")
    return progress


class _Bar:
    def __init__(self, desc: str, total: int | None, unit: str) -> None:
        try:
            from tqdm.auto import tqdm
        except ImportError:  # pragma: no cover - depends on the environment
            raise MissingDependencyError(
                "progress bars need tqdm: pip install tqdm (or pass progress=False)",
                package="tqdm",
            ) from None
        self.bar = tqdm(desc=desc, total=total, unit=unit, leave=False)

    def __call__(self, n: int) -> None:
        self.bar.update(n - self.bar.n)

    def close(self) -> None:
        self.bar.close()


def progress_hook(progress: bool | None, desc: str, total: int | None = None, unit: str = "step") -> Any:
    """A callable for the compiled module's ``progress=`` hook (called with the count of steps
    done), with a ``close()`` method; None when progress is off. ``progress=None`` turns bars on
    only when standard error is a terminal."""
    if not _wanted(progress):
        return None
    return _Bar(desc, total, unit)


def close(hook: Callable[[int], None] | None) -> None:
    if hook is not None:
        hook.close()  # type: ignore[attr-defined]
