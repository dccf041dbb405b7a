"""Options declared once: each dataclass field carries its name, type, default, help and choices.

The option dataclasses (:mod:`.options`) declare every field with :func:`option`. The command
line (:mod:`tiltedring.cli`), TOML run files and batch manifests (:mod:`tiltedring.jobs`,
:mod:`tiltedring.batch`) and the run record ``fit.json`` are all generated from these
declarations, so a new option is added in one place.

How a field is spelled follows from its type and its ``form``:

- ``value``: ``--name VALUE``; the field's type (number, whole number, text, or "number or text");
- ``switch``: a boolean; ``--name`` when its default is off, ``--no-name`` when it is on;
- ``numbers``: ``--name 0,10,20`` (comma-separated numbers; a list in TOML and a quoted cell in a manifest);
- ``names``: ``--flag A,B`` (comma-separated names, repeatable; a list in TOML);
- ``entries``: a dict of named numbers, one ``--entry`` flag and one manifest column per name
  (a sub-table in TOML, e.g. ``[fit.initial]``).

This module imports no numerics, so ``tiltedring --help`` stays quick.
"""

from __future__ import annotations

import dataclasses
import re
import typing
from dataclasses import dataclass

from ..errors import InputError

__all__ = ["option", "Bounds", "OptionSpec", "field_specs", "flat_specs", "coerce", "validate", "check_range",
           "recorded_values"]

FORMS = ("value", "switch", "numbers", "names", "entries")
NUMBER_OR_TEXT = "number or text"
_TRUE, _FALSE = ("true", "yes", "on", "1"), ("false", "no", "off", "0")


def option(default=dataclasses.MISSING, *, help: str, default_factory=dataclasses.MISSING, group: str = "",
           choices: tuple | None = None, metavar: str | None = None, flag: str | None = None, form: str | None = None,
           entries: dict | None = None, path: bool = False, command_line: bool = True, recorded: bool = True,
           bounds: "Bounds | None" = None, entry_bounds: dict | None = None, length: bool = False):
    """A dataclass field that declares an option (module docstring).

    ``help`` is required; ``group`` names the help section; ``flag`` overrides ``--name``;
    ``entries`` maps each name of an ``entries`` field to its help; ``path``: a file name, read
    relative to the run file or manifest that gives it; ``command_line=False`` for a field set by
    another flag (it must say which in its help); ``recorded=False`` keeps it out of ``fit.json``
    (settings that cannot change a result). ``bounds``: the physical range of a number (every
    number must be finite); ``entry_bounds``: a :class:`Bounds` per entry name; ``length``: text is
    a length such as ``4pix`` (:func:`..fitting.rings.parse_width`).
    """
    if not help:
        raise TypeError("every option needs help text")
    meta = {"help": help, "group": group, "choices": tuple(choices) if choices else None, "metavar": metavar,
            "flag": flag, "form": form, "entries": dict(entries or {}), "path": path,
            "command_line": command_line, "recorded": recorded, "bounds": bounds,
            "entry_bounds": dict(entry_bounds or {}), "length": length}
    return dataclasses.field(default=default, default_factory=default_factory, metadata={"option": meta})


@dataclass(frozen=True)
class Bounds:
    """The range of a number: ``minimum``/``maximum`` inclusive, ``above``/``below`` exclusive.

    ``why``: a few words on where the range comes from, added to the refusal."""

    minimum: float | None = None
    maximum: float | None = None
    above: float | None = None
    below: float | None = None
    why: str = ""

    def describe(self) -> str:
        low = (f"at least {self.minimum:g}" if self.minimum is not None else
               f"above {self.above:g}" if self.above is not None else "")
        high = (f"at most {self.maximum:g}" if self.maximum is not None else
                f"below {self.below:g}" if self.below is not None else "")
        return " and ".join(p for p in (low, high) if p) or "finite"

    def holds(self, x: float) -> bool:
        return ((self.minimum is None or x >= self.minimum) and (self.maximum is None or x <= self.maximum)
                and (self.above is None or x > self.above) and (self.below is None or x < self.below))


@dataclass(frozen=True)
class OptionSpec:
    """One option as every interface sees it. ``parent`` names the ``entries`` field an entry belongs to."""

    name: str
    flag: str
    kind: object  # float, int, str, bool or NUMBER_OR_TEXT
    form: str
    default: object
    help: str
    group: str = ""
    choices: tuple | None = None
    metavar: str | None = None
    entries: tuple = ()
    path: bool = False
    command_line: bool = True
    recorded: bool = True
    parent: str | None = None
    owner: type | None = None
    bounds: Bounds | None = None
    length: bool = False
    entry_bounds: tuple = ()

    def help_text(self) -> str:
        """The help with the default appended (``%`` escaped for argparse)."""
        text = self.help
        if self.form not in ("switch", "entries") and self.default not in (None, (), {}):
            text += f" (default {self.default})"
        return text.replace("%", "%%")


def _kind(hint) -> object:
    """float, int, str, bool or NUMBER_OR_TEXT from a field's type hint (``X | None`` -> X)."""
    args = [a for a in typing.get_args(hint) if a is not type(None)]
    hint = args[0] if len(args) == 1 else hint
    if hint in (float, int, str, bool):
        return hint
    return NUMBER_OR_TEXT


def field_specs(cls) -> tuple:
    """The :class:`OptionSpec` of every field of the option dataclass ``cls``, in field order."""
    hints = typing.get_type_hints(cls)
    out = []
    for f in dataclasses.fields(cls):
        meta = f.metadata.get("option")
        if meta is None:
            raise TypeError(f"{cls.__name__}.{f.name} is not declared with option(...): give it help text")
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
        hint = hints[f.name]
        origin = typing.get_origin(hint) or hint
        form = meta["form"] or ("switch" if hint is bool else "entries" if origin is dict else "value")
        if form not in FORMS:
            raise TypeError(f"{cls.__name__}.{f.name}: form {form!r} unknown; one of {FORMS}")
        kind = {"switch": bool, "numbers": float, "names": str, "entries": float}.get(form) or _kind(hint)
        name_flag = f.name.replace("_", "-")
        flag = meta["flag"] or (f"--no-{name_flag}" if form == "switch" and default else f"--{name_flag}")
        out.append(OptionSpec(name=f.name, flag=flag, kind=kind, form=form, default=default, help=meta["help"],
                              group=meta["group"], choices=meta["choices"], metavar=meta["metavar"],
                              entries=tuple(meta["entries"].items()), path=meta["path"],
                              command_line=meta["command_line"], recorded=meta["recorded"], owner=cls,
                              bounds=meta["bounds"], length=meta["length"],
                              entry_bounds=tuple(meta["entry_bounds"].items())))
    return tuple(out)


def flat_specs(*classes) -> dict:
    """One flat vocabulary over several option dataclasses: name -> :class:`OptionSpec`.

    Each entry of an ``entries`` field becomes its own ``value`` option (``parent`` set), which is
    how the command line and manifests spell it. Names must be unique across the classes.
    """
    out = {}
    for cls in classes:
        for spec in field_specs(cls):
            items = [spec]
            if spec.form == "entries":
                bounds = dict(spec.entry_bounds)
                items = [OptionSpec(name=entry, flag="--" + entry.replace("_", "-"), kind=float, form="value",
                                    default=None, help=text, group=spec.group, metavar="VALUE",
                                    command_line=spec.command_line, bounds=bounds.get(entry),
                                    parent=spec.name, owner=cls) for entry, text in spec.entries]
            for item in items:
                if item.name in out:
                    raise TypeError(f"option {item.name!r} is declared twice ({out[item.name].owner.__name__}, "
                                    f"{cls.__name__})")
                out[item.name] = item
    return out


def coerce(spec: OptionSpec, value, label: str | None = None):
    """``value`` (from the command line, TOML or a manifest cell) as the type ``spec`` declares.

    Idempotent; raises :class:`InputError` naming ``label`` (default the option's name) and the
    spelling expected.
    """
    label = label or spec.name
    if value is None:
        return None
    if spec.form == "entries":
        if not isinstance(value, dict):
            raise InputError(f"{label}: give a table of named values ({', '.join(e for e, _ in spec.entries)})")
        known = dict(spec.entries)
        bad = sorted(set(value) - set(known))
        if bad:
            raise InputError(f"{label}: unknown name(s) {bad}; choose from {', '.join(known)}")
        bounds = dict(spec.entry_bounds)
        return {k: _in_range(bounds.get(k), _scalar(float, v, f"{label}.{k}"), f"{label}.{k}", None)
                for k, v in value.items()}
    if spec.form == "numbers":
        items = value.split(",") if isinstance(value, str) else value if isinstance(value, (list, tuple)) else [value]
        try:
            if any(isinstance(v, (bool, dict, list, tuple)) for v in items):
                raise TypeError
            numbers = tuple(float(v) for v in items if not (isinstance(v, str) and not v.strip()))
        except (TypeError, ValueError):
            raise InputError(f"{label} {value!r}: give comma-separated numbers") from None
        for number in numbers:
            _in_range(spec.bounds, number, label, None)
        return numbers
    if spec.form == "names":
        if not isinstance(value, (str, list, tuple)) or any(isinstance(v, (dict, list, tuple)) for v in
                                                             ([] if isinstance(value, str) else value)):
            raise InputError(f"{label}: give names as text, e.g. \"inclination\" or [\"inclination\", \"v_systemic\"]")
        items = [value] if isinstance(value, str) else list(value)
        out = tuple(dict.fromkeys(n.strip() for item in items for n in str(item).split(",") if n.strip()))
        return _check_choices(spec, out, label)
    value = _check_choices(spec, _scalar(spec.kind, value, label), label)
    if isinstance(value, str):
        if spec.length:
            _check_length(spec, value, label)
        return value
    return _in_range(spec.bounds, value, label, spec.default)


def check_range(value, bounds: "Bounds | None", label: str, default=None):
    """``value`` when it is a finite number inside ``bounds``; else :class:`InputError` naming ``label``, the
    value and the range (for options outside the dataclasses, e.g. ``massmodel``'s)."""
    return _in_range(bounds, value, label, default)


def _in_range(bounds, value, label, default):
    """``value`` when it is a finite number inside ``bounds``; else :class:`InputError` naming it and the range."""
    import math

    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return value
    if not math.isfinite(value) or (bounds is not None and not bounds.holds(value)):
        wanted = bounds.describe() if bounds is not None else "finite"
        hint = f" (default {default})" if default not in (None, (), {}) else ""
        why = f": {bounds.why}" if bounds is not None and bounds.why else ""
        kind = "whole number" if isinstance(value, int) else "number"
        raise InputError(f"{label} = {value!r} is out of range; give a finite {kind} {wanted}{hint}{why}"
                         .replace(f"finite {kind} finite", f"finite {kind}"))
    return value


def _check_length(spec, text, label):
    """A length written as text (``9arcsec``, ``4pix``, ``0.5beam``): its syntax, and its number's range."""
    from ..fitting.rings import parse_width

    try:
        parse_width(text, 1.0, 1.0)
    except InputError as exc:
        raise InputError(f"{label}: {exc}") from None
    number = float(re.match(r"\s*([0-9.eE+-]+)", text).group(1))
    _in_range(spec.bounds, number, label, spec.default)


def validate(options) -> None:
    """Check (and normalise, e.g. ``"a,b"`` -> ``("a", "b")``) every field of an option dataclass in place,
    as :func:`coerce` does for the command line: the API gets the same checks as every other entry point."""
    for spec in field_specs(type(options)):
        value = getattr(options, spec.name)
        if value is not None:
            object.__setattr__(options, spec.name, coerce(spec, value, spec.name))


def _scalar(kind, value, label):
    if kind is bool:
        if isinstance(value, bool) or (isinstance(value, int) and value in (0, 1)):
            return bool(value)
        text = str(value).strip().lower()
        if text in _TRUE + _FALSE:
            return text in _TRUE
        raise InputError(f"{label}: expected true or false, got {value!r}")
    if kind is str:
        return value.strip() if isinstance(value, str) else str(value)
    if kind is NUMBER_OR_TEXT:  # "9" and 9 are the same number; "4pix" stays text
        try:
            return _scalar(float, value, label)
        except InputError:
            if isinstance(value, str):
                return value.strip()
            raise
    try:
        if isinstance(value, bool):
            raise ValueError
        if isinstance(value, (dict, list, tuple)):
            raise TypeError
        number = float(value)
        if kind is int:
            if number != number or abs(number) == float("inf") or number != int(number):
                raise ValueError
            return int(number)
        return number
    except (TypeError, ValueError, OverflowError):
        expected = "a whole number" if kind is int else "a number"
        raise InputError(f"{label}: expected {expected}, got {value!r}") from None


def _check_choices(spec, value, label):
    if spec.choices:
        for item in value if isinstance(value, tuple) else (value,):
            if item not in spec.choices:
                raise InputError(f"{label}: {item!r} unknown; choose one of {', '.join(spec.choices)}")
    return value


def recorded_values(options) -> dict:
    """The fields of an option dataclass that belong in ``fit.json`` (``recorded``), as plain values."""
    values = dataclasses.asdict(options)
    return {spec.name: values[spec.name] for spec in field_specs(type(options)) if spec.recorded}
