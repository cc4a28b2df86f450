"""The shared shape of liftpool's validated settings (counting rules, model settings)."""

from __future__ import annotations

import math
from dataclasses import asdict, fields
from typing import Any

__all__ = ["OptionsMixin"]


class OptionsMixin:
    """For frozen dataclasses with an ``extra`` field that collects unknown keys (rejected in validation)."""

    @classmethod
    def option_names(cls) -> list[str]:
        return [f.name for f in fields(cls) if f.name != "extra"]

    @classmethod
    def from_mapping(cls, values: dict[str, Any]):
        """Build from a mapping (a config file section); unknown keys are an error listing the valid ones,
        and every value must have its field's type (``"no"`` is not a boolean, ``2.5`` is not a count)."""
        names = set(cls.option_names())
        kinds = {f.name: str(f.type) for f in fields(cls)}
        for k, v in values.items():
            if k in names:
                _check_type(k, v, kinds[k])
        return cls(**{k: v for k, v in values.items() if k in names},
                   extra={k: v for k, v in values.items() if k not in names})

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d.pop("extra")
        return {k: list(v) if isinstance(v, tuple) else v for k, v in d.items()}


_WORDS = {"bool": "true or false (no quotes)", "int": "a whole number", "float": "a number", "str": "text in quotes"}


def _fits(value, kind: str) -> bool:
    if kind == "bool":
        return isinstance(value, bool)
    if kind == "int":
        return isinstance(value, int) and not isinstance(value, bool)
    if kind == "float":
        return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if kind == "str":
        return isinstance(value, str)
    if kind.startswith("tuple[") and kind.endswith(", ...]"):
        inner = kind[len("tuple["):-len(", ...]")]
        return isinstance(value, (list, tuple)) and all(_fits(x, inner) for x in value)
    return True  # other annotations are checked by the class's own validation


def _check_type(name: str, value, kind: str) -> None:
    """Raise a ConfigError naming the setting, the value and the type it needs."""
    from liftpool.data_prep.errors import ConfigError

    options = [k.strip() for k in kind.split("|")]
    if "None" in options and value is None:
        return
    options = [k for k in options if k != "None"]
    if any(_fits(value, k) for k in options):
        return
    want = " or ".join(_WORDS.get(k, f"a list of {_WORDS.get(k[6:-6], k)}s" if k.startswith("tuple[") else k)
                       for k in options)
    raise ConfigError(problem=f"'{name}' must be {want}, got {value!r}",
                      fix=f"write {name} as {want}")
