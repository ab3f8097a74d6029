"""Pure math: arrays in, arrays or frozen dataclasses out. No files, no config objects."""

import difflib
from enum import Enum


def lookup_member(enum_class: type[Enum], value: str, *, what: str):
    """`enum_class(value)`, or a ValueError naming the value, the allowed ones and a close match."""
    try:
        return enum_class(value)
    except ValueError:
        allowed = sorted(m.value for m in enum_class)
        message = f"unknown {what} {value!r}; allowed: {', '.join(allowed)}"
        close = difflib.get_close_matches(str(value), allowed, n=1)
        if close:
            message += f"; did you mean {close[0]!r}?"
        raise ValueError(message) from None
