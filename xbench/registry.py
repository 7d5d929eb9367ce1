"""The one registry mechanism: explainers and metrics (and plugins of both) register into a
:class:`Registry`, whose look-up errors name the valid keys and the new name of a renamed one, and whose
entries declare their settings as :class:`xbench.schema.Field` objects checked in one place.

A foundation module like ``schema.py``: every stage may import it.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, TypeVar

from xbench.errors import XbenchInputError
from xbench.names import RENAMED
from xbench.schema import Field, Where, as_where, check_value

S = TypeVar("S")


class Registry(dict[str, S]):
    """Keys to specs, in registration order. ``kind`` names what is registered (``explainer``,
    ``metric``) in errors and selects the renamed keys of ``names.RENAMED``."""

    def __init__(self, kind: str) -> None:
        super().__init__()
        self.kind = kind

    def lookup(self, key: str) -> S:
        """The spec of ``key``; an unknown key is one error naming the valid keys (or the new name)."""
        if key in self:
            return self[key]
        new = RENAMED.get(self.kind, {}).get(key)
        if new is not None:
            raise XbenchInputError(
                f"{self.kind} '{key}'",
                f"unknown {self.kind} key: '{key}' was renamed to '{new}'",
                expected=new,
                found=key,
            )
        raise XbenchInputError(
            f"{self.kind} '{key}'", f"unknown {self.kind} key", expected="one of " + ", ".join(self), found=key
        )


def settings_schema(defaults: Mapping[str, Any] | None, declared: Mapping[str, Field] | None) -> dict[str, Field]:
    """The full settings schema of a registration: declared fields, plus a field inferred from the default
    for each setting that has no declaration (plugins may declare defaults only)."""
    schema = dict(declared or {})
    for name, value in (defaults or {}).items():
        if name not in schema:
            schema[name] = _inferred(value)
    return schema


def _inferred(default: Any) -> Field:
    """A field for a setting declared by its default only: values keep the default's kind (a number stays
    a number, a flag a flag, a list a list); a default of None admits anything."""
    if isinstance(default, bool):
        return Field("bool", default)
    if isinstance(default, int | float):
        return Field("number", default)
    if isinstance(default, list | tuple):
        return Field("list", list(default))
    return Field("any", default, nullable=True)


def check_settings(
    schema: Mapping[str, Field], settings: Mapping[str, Any], where: str | Where, *, extra: tuple[str, ...] = ()
) -> dict[str, Any]:
    """Settings checked against their declared fields, defaults filled in. ``extra`` names settings the
    runner handles itself (e.g. ``tiles``), passed through unchecked."""
    w = as_where(where)
    out: dict[str, Any] = {}
    for name, value in settings.items():
        if name in extra:
            out[name] = value
        elif name not in schema:
            raise w.child(name).error(
                "unknown setting", expected="one of " + ", ".join(schema) if schema else "no settings", found=name
            )
    for name, spec in schema.items():
        out[name] = check_value(settings[name], spec, w.child(name)) if name in settings else spec.default
    return out
