"""The one progress bar of tdkit (tqdm, ``progress`` extra), imported only when asked for."""

from __future__ import annotations

from typing import Any

__all__ = ["progress_bar"]


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
