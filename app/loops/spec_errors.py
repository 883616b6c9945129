"""A loop spec's validation errors in plain words, one line per problem, naming the field."""

from __future__ import annotations

from typing import Any

from pydantic import ValidationError

from .schemas import NAME_PATTERN, SLUG_PATTERN

PATTERN_WORDS = {
    NAME_PATTERN: "a lowercase name: a letter, then letters, digits or '_' (at most 63)",
    SLUG_PATTERN: "lowercase letters, digits and '-', 2 to 63 characters, not starting with '-'",
}
# the discriminator's value appears in the location of a union member's errors; drop it
UNION_TAGS = frozenset({"discrete", "continuous"})


def field_path(location: tuple[Any, ...]) -> str:
    """('features', 3, 'name') -> 'features[3].name'."""
    path = ""
    for part in location:
        if isinstance(part, int):
            path += f"[{part}]"
        elif part not in UNION_TAGS:
            path += f".{part}" if path else str(part)
    return path or "the spec"


def _words(error: dict[str, Any]) -> str:
    kind, ctx = error["type"], error.get("ctx") or {}
    if kind == "missing":
        return "is required"
    if kind == "extra_forbidden":
        return "is not a field of a loop spec (check its spelling)"
    if kind == "string_pattern_mismatch":
        wanted = PATTERN_WORDS.get(ctx.get("pattern", ""), f"text matching {ctx.get('pattern')}")
        return f"must be {wanted}; got {error.get('input')!r}"
    if kind == "union_tag_invalid":
        return "kind must be 'discrete' or 'continuous'"
    if kind == "union_tag_not_found":
        return "needs a kind: 'discrete' or 'continuous'"
    message = str(error.get("msg", "is not valid"))
    message = message.removeprefix("Value error, ")
    message = message.replace("Input should be", "must be").replace("List should", "must")
    message = message.replace("String should", "must")
    shown = error.get("input")
    if (
        isinstance(shown, int | float | str)
        and not isinstance(shown, bool)
        and len(str(shown)) < 40
    ):
        message += f"; got {shown!r}"
    return message[0].lower() + message[1:] if message else "is not valid"


def plain_problems(exc: ValidationError) -> list[str]:
    """One line per problem: '<field>: <what is wrong>', without library links or codes."""
    return [f"{field_path(tuple(e['loc']))}: {_words(dict(e))}" for e in exc.errors()]
