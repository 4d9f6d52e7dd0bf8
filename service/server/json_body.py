"""Strict reading of JSON request bodies: one clear message per real cause.

RFC 8259 leaves duplicate object keys undefined (section 4) and lets a parser limit nesting
depth and the size of numbers (section 9); this reader refuses all three with a message that
names the problem, instead of letting the last duplicate win or reporting a deep or huge body
as "not valid JSON". The media type must be ``application/json`` (RFC 8259 section 11), with
an optional ``charset=utf-8``.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

#: Deepest nesting accepted (a plan request nests two levels).
MAX_DEPTH = 16
#: Longest number literal accepted, in characters (a coordinate with 17 significant digits
#: and a sign, exponent and point fits with room to spare).
MAX_NUMBER_CHARS = 40

EXAMPLE = (
    'send a JSON object such as {"origin": {"node": 0}, "destination": {"node": 1}, '
    '"deadline_ms": 100}'
)

_STRING = re.compile(r'"(?:[^"\\]|\\.)*"', re.DOTALL)
_BRACKETS = re.compile(r"[\[\]{}]")


class BodyError(Exception):
    """The body cannot be read as this endpoint's JSON: ``status`` (400 or 415) and why."""

    def __init__(self, status: int, detail: str) -> None:
        super().__init__(detail)
        self.status = status
        self.detail = detail


def check_media_type(content_type: str | None, expected: str) -> None:
    """Raise 415 unless ``content_type`` is ``expected`` (parameters: only charset=utf-8)."""
    if content_type is None or not content_type.strip():
        raise BodyError(415, f"the request has no Content-Type; send Content-Type: {expected}")
    media, _, params = content_type.partition(";")
    if media.strip().lower() != expected:
        raise BodyError(
            415,
            f"Content-Type {media.strip()!r} is not supported here; send Content-Type: {expected}",
        )
    for param in params.split(";"):
        name, _, value = param.partition("=")
        if name.strip().lower() == "charset" and value.strip().strip('"').lower() not in (
            "utf-8",
            "utf8",
        ):
            raise BodyError(
                415, f"charset {value.strip()!r} is not supported; JSON bodies are UTF-8"
            )


class _Refused(Exception):
    pass


def _pairs(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise _Refused(f'the key "{key}" appears twice in one object; give each key once')
        out[key] = value
    return out


def _number_text(text: str) -> str:
    return text if len(text) <= 24 else f"{text[:12]}...{text[-6:]} ({len(text)} characters)"


def _int(text: str) -> int:
    if len(text) > MAX_NUMBER_CHARS:
        raise _Refused(
            f"the number {_number_text(text)} is too long: numbers here have at most "
            f"{MAX_NUMBER_CHARS} characters"
        )
    return int(text)


def _float(text: str) -> float:
    if len(text) > MAX_NUMBER_CHARS:
        raise _Refused(
            f"the number {_number_text(text)} is too long: numbers here have at most "
            f"{MAX_NUMBER_CHARS} characters"
        )
    value = float(text)
    if not math.isfinite(value):
        raise _Refused(f"the number {_number_text(text)} is out of range for a 64-bit float")
    return value


def _constant(name: str) -> Any:
    raise _Refused(f"{name} is not JSON (RFC 8259 has no NaN or Infinity); send a number")


def _depth(text: str) -> int:
    """Deepest nesting of ``text`` (brackets inside strings do not count)."""
    depth = deepest = 0
    for bracket in _BRACKETS.findall(_STRING.sub("", text)):
        if bracket in "[{":
            depth += 1
            deepest = max(deepest, depth)
        else:
            depth -= 1
    return deepest


def parse_json(raw: bytes) -> Any:
    """The JSON value of ``raw`` (UTF-8), or :class:`BodyError` (400) saying what is wrong."""
    if not raw.strip():
        raise BodyError(400, f"the body is empty; {EXAMPLE}")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise BodyError(
            400,
            f"the body is not UTF-8 text (byte 0x{raw[exc.start]:02x} at offset {exc.start}); "
            "JSON bodies are UTF-8",
        ) from None
    # Counting brackets is cheap; the exact depth is worked out only when it might matter.
    if text.count("[") + text.count("{") > MAX_DEPTH and _depth(text) > MAX_DEPTH:
        raise BodyError(
            400,
            f"the body nests {_depth(text)} levels deep; the limit is {MAX_DEPTH} "
            "(a plan request nests two)",
        )
    try:
        return json.loads(
            text,
            object_pairs_hook=_pairs,
            parse_int=_int,
            parse_float=_float,
            parse_constant=_constant,
        )
    except _Refused as exc:
        raise BodyError(400, f"the body was refused: {exc}") from None
    except json.JSONDecodeError as exc:
        raise BodyError(
            400,
            f"the body is not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno}); "
            + EXAMPLE,
        ) from None
    except RecursionError:  # unreachable below MAX_DEPTH; kept so no input can escape
        raise BodyError(400, f"the body nests too deep; the limit is {MAX_DEPTH}") from None
