"""Reading one value of a spec table, each error naming its dotted key.

Shared by spec.py and the matching methods (each method reads its own options, see
matching/base.py), so a method module needs no import of spec.py.
"""

from __future__ import annotations

from typing import Any

from sqlmatch.errors import SpecError


def check_keys(section: dict, key: str, allowed: set[str]) -> None:
    for k in section:
        if k not in allowed:
            hint = ", ".join(sorted(allowed))
            raise SpecError(f"{key}.{k}" if key else k, "is not a known key.", f"use one of: {hint}.")


def read_str(section: dict, key: str, name: str, *, required: bool = True, default: str | None = None) -> str | None:
    value = section.get(name, default)
    full = f"{key}.{name}" if key else name
    if value is None:
        if required:
            raise SpecError(full, "is missing.", f"set {name} = \"...\" under [{key}].")
        return None
    if not isinstance(value, str) or not value.strip():
        raise SpecError(full, f"must be a non-empty string, got {value!r}.")
    return value


def read_int(section: dict, key: str, name: str, *, default: int | None = None, low: int = 1, high: int = 10_000) -> int:
    value = section.get(name, default)
    full = f"{key}.{name}"
    if value is None:
        raise SpecError(full, "is missing.", f"set {name} = <whole number> under [{key}].")
    if isinstance(value, bool) or not isinstance(value, int):
        raise SpecError(full, f"must be a whole number, got {value!r}.")
    if not low <= value <= high:
        raise SpecError(full, f"must be between {low} and {high}, got {value}.")
    return value


def read_choice(section: dict, key: str, name: str, choices: tuple[str, ...], default: str | None = None) -> str:
    value = read_str(section, key, name, required=default is None, default=default)
    if value not in choices:
        raise SpecError(f"{key}.{name}", f"must be one of {', '.join(choices)}; got {value!r}.")
    return value


def read_bool(section: dict, key: str, name: str, *, default: bool) -> bool:
    value = section.get(name, default)
    if not isinstance(value, bool):
        raise SpecError(f"{key}.{name}", f"must be true or false, got {value!r}.")
    return value


def feature_list(value: Any, key: str, names: list[str], *, what: str = "feature names") -> list[str]:
    """A list of names, each one of `names` (the spec's features)."""
    if not isinstance(value, list) or not all(isinstance(x, str) for x in value):
        raise SpecError(key, f"must be a list of {what}.")
    for n in value:
        if n not in names:
            raise SpecError(key, f"{n!r} is not a feature.", f"use names from [[features]]: {', '.join(names)}.")
    return value
