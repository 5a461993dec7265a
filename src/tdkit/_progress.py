"""The one progress bar of tdkit (tqdm, ``progress`` extra), imported only when asked for."""

from __future__ import annotations

from contextlib import AbstractContextManager, nullcontext
from typing import Any

__all__ = ["progress_bar", "sweep_progress"]


def progress_bar(
    owner: str, total: int | None, enabled: bool, *, unit: str, desc: str | None = None
) -> Any:
    """A tqdm bar counting ``unit`` up to ``total``, or None when not ``enabled``.

    Raises
    ------
    ImportError
        Naming ``owner`` and the extra to install, when tqdm is missing.
    """
    if not enabled:
        return None
    try:
        from tqdm.auto import tqdm
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError(f"{owner}(progress=True) needs tqdm: pip install 'tdkit[progress]'"
                          ) from exc
    return tqdm(total=total, unit=unit, desc=desc)


def sweep_progress(owner: str, enabled: bool, total: int) -> AbstractContextManager[Any]:
    """``with sweep_progress(...) as bar``: a bar counting a solver's sweeps
    (:func:`progress_bar`), closed on exit, or None when not ``enabled``."""
    bar = progress_bar(owner, total, enabled, unit="sweep", desc=owner)
    return nullcontext() if bar is None else bar
