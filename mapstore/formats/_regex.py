"""Regular expressions from files a user or a collaborator hands over, compiled only when they cannot
backtrack catastrophically.

Python's ``re`` backtracks: a pattern such as ``(a+)+$`` takes time exponential in the length of a
text it fails on, so one line of a name-rules file (or of a manifest someone sent) could hang an index.
Before compiling, the pattern's parse tree (``re._parser``, the same parser ``re`` uses) is searched for
a repetition of many inside another repetition of many, or an alternation under a repetition of many
whose branches could both match at one place (``(a|aa)*``): the shapes catastrophic cases have.  Such a
pattern is refused in one line; rewrite it with one repetition (``a+`` for ``(a+)+``), or with branches
that start with different characters.  (A check before use rather than a linear-time engine: RE2-style
engines have no lookarounds, which name rules use, and the refused shapes are rare in real rules.)
"""

from __future__ import annotations

import re
from typing import Any

__all__ = ["safe_regex", "MAX_PATTERN"]

MAX_PATTERN = 2_000  # characters of one pattern
_MANY = 16  # a repetition of more than this many is "many"


def safe_regex(pattern: Any, where: str, error: type[Exception], flags: int = 0) -> re.Pattern[str]:
    """``pattern`` compiled, or ``error`` naming ``where`` (not text, too long, invalid, or a nested
    repetition that backtracks catastrophically).

    >>> safe_regex(r"(?P<sub>[0-9]+)/.*\\.nii", "rule", ValueError).pattern
    '(?P<sub>[0-9]+)/.*\\\\.nii'
    >>> safe_regex(r"(a+)+$", "rule", ValueError)
    Traceback (most recent call last):
    ValueError: rule: the pattern '(a+)+$' repeats a repetition ('+' inside '+'), which can take exponential time; write it with one repetition
    """
    if not isinstance(pattern, str):
        raise error(f"{where}: a pattern must be text, got {type(pattern).__name__}")
    if len(pattern) > MAX_PATTERN:
        raise error(f"{where}: a pattern of {len(pattern):,} characters (at most {MAX_PATTERN:,})")
    try:
        from re import _parser  # type: ignore[attr-defined]

        tree = _parser.parse(pattern, flags)
        compiled = re.compile(pattern, flags)
    except (re.error, RecursionError, OverflowError) as exc:
        raise error(f"{where}: invalid regex ({exc})") from exc
    nested = _nested_repeat(tree, None)
    if nested and nested[1] == "|":
        raise error(f"{where}: the pattern {pattern!r} repeats an alternation whose branches can match at one "
                    f"place (inside {nested[0]!r}), which can take exponential time; start each branch with a "
                    "different character")
    if nested:
        raise error(f"{where}: the pattern {pattern!r} repeats a repetition ({nested[1]!r} inside {nested[0]!r}), "
                    "which can take exponential time; write it with one repetition")
    return compiled


def _nested_repeat(tree, outer: str | None) -> tuple[str, str] | None:
    from re import _constants as c  # type: ignore[attr-defined]

    repeats = {c.MAX_REPEAT, c.MIN_REPEAT, getattr(c, "POSSESSIVE_REPEAT", None)}
    for op, av in tree:
        if op in repeats:
            lo, hi, body = av
            many = hi == c.MAXREPEAT or hi > _MANY
            sym = "+" if lo == 1 and hi == c.MAXREPEAT else "*" if lo == 0 and hi == c.MAXREPEAT else f"{{{lo},{hi}}}"
            if many and outer is not None:
                return outer, sym
            hit = _nested_repeat(body, sym if many else outer)
            if hit:
                return hit
        elif op == c.SUBPATTERN:
            hit = _nested_repeat(av[-1], outer)
            if hit:
                return hit
        elif op == c.BRANCH:
            if outer is not None and not _distinct_starts(av[1], c):
                return outer, "|"
            for branch in av[1]:
                hit = _nested_repeat(branch, outer)
                if hit:
                    return hit
        elif op in (c.ASSERT, c.ASSERT_NOT):
            hit = _nested_repeat(av[1], outer)
            if hit:
                return hit
        elif op == getattr(c, "ATOMIC_GROUP", None):
            hit = _nested_repeat(av, outer)
            if hit:
                return hit
    return None


def _distinct_starts(branches, c) -> bool:
    """Every branch starts with a literal character, and no two with the same one."""
    firsts = []
    for b in branches:
        if not len(b) or b[0][0] != c.LITERAL:
            return False
        firsts.append(b[0][1])
    return len(set(firsts)) == len(firsts)
