"""How tdkit names a value or an exception inside an error message (one definition each)."""

from __future__ import annotations

from typing import Any

__all__ = ["REPR_LIMIT", "short", "describe", "describe_exception", "summarize_exception"]

REPR_LIMIT = 200
"""Longest ``repr`` quoted in a message; longer ones are cut and end with ``...``."""


def short(x: Any) -> str:
    """``repr(x)``, cut to :data:`REPR_LIMIT` characters; a broken ``__repr__`` is survived.

    Examples
    --------
    >>> short("a" * 300)[-5:], len(short("a" * 300))
    ('aa...', 200)
    """
    try:
        text = repr(x)
    except Exception:  # a broken __repr__ must not hide the real error
        text = f"<{type(x).__name__} object>"
    return text if len(text) <= REPR_LIMIT else text[: REPR_LIMIT - 3] + "..."


def describe(x: Any) -> str:
    """The type and the short repr: ``"list [1, 2]"``.

    Examples
    --------
    >>> describe([1, 2])
    'list [1, 2]'
    """
    return f"{type(x).__name__} {short(x)}"


def describe_exception(exc: BaseException) -> str:
    """``"TypeName: message"`` (just ``"TypeName"`` when the message is empty).

    Examples
    --------
    >>> describe_exception(ValueError("bad\\nvalue")), describe_exception(KeyError())
    ('ValueError: bad\\nvalue', 'KeyError')
    """
    text = str(exc)
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def summarize_exception(exc: BaseException) -> str:
    """:func:`describe_exception` with the first line of the message only.

    Examples
    --------
    >>> summarize_exception(ValueError("bad\\nvalue"))
    'ValueError: bad'
    """
    text = str(exc).splitlines()[0] if str(exc) else ""
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__
