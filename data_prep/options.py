"""The shared shape of liftpool's validated settings (counting rules, model settings)."""

from __future__ import annotations

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
        """Build from a mapping (a config file section); unknown keys are an error listing the valid ones."""
        names = set(cls.option_names())
        return cls(**{k: v for k, v in values.items() if k in names},
                   extra={k: v for k, v in values.items() if k not in names})

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d.pop("extra")
        return {k: list(v) if isinstance(v, tuple) else v for k, v in d.items()}
