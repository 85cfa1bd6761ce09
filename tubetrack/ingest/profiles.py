"""Layout profiles: TOML files that map a foreign export to a canonical table kind.

A profile is data, never code: it is parsed with :mod:`tomllib` and validated strictly. Column
names from it are quoted identifiers in SQL, and every value from it is a bound parameter.
See ``docs/profiles.md`` for the format; :func:`load_profile` raises :class:`ProfileError` naming
the profile file, the key and the value, and listing what is allowed.
"""

from __future__ import annotations

import fnmatch
import re
import tomllib
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path, PurePosixPath
from typing import Any

from tubetrack.errors import ProfileError
from tubetrack.ingest.layout import KINDS, UNIT_FAMILIES, Kind

TOP_KEYS = (
    "name",
    "description",
    "kind",
    "files",
    "format",
    "delimiter",
    "decimal",
    "encoding",
    "columns",
    "units",
    "values",
    "constants",
    "filename",
    "time",
)
TIME_KEYS = ("formats", "timezone", "ambiguous")
FILENAME_KEYS = ("pattern",)
FORMATS = ("csv", "jsonl", "parquet")
DECIMALS = (".", ",")
AMBIGUOUS_POLICIES = ("order", "earlier", "later", "reject")
ENCODINGS = ("utf-8", "utf-16", "latin-1")
_ENCODING_ALIASES = {
    "utf8": "utf-8",
    "iso-8859-1": "latin-1",
    "latin1": "latin-1",
    "utf16": "utf-16",
}
# DuckDB strptime specifiers (https://duckdb.org/docs/sql/functions/dateformat)
_STRPTIME_SPECS = set("aAwdbBmyYHIpMSfzZjUWcxXTgGuV%-")


@dataclass(frozen=True)
class Profile:
    """A validated layout profile (all names canonical, units checked)."""

    name: str
    path: str
    kind: str
    description: str = ""
    files: tuple[str, ...] = ()
    format: str | None = None
    delimiter: str | None = None
    decimal: str = "."
    encoding: str = "utf-8"
    columns: dict[str, tuple[str, ...]] = field(default_factory=dict)
    units: dict[str, str] = field(default_factory=dict)
    values: dict[str, dict[str, str]] = field(default_factory=dict)
    constants: dict[str, str] = field(default_factory=dict)
    filename_pattern: str | None = None
    time_formats: tuple[str, ...] = ()
    timezone: str = "UTC"
    ambiguous: str = "order"

    @property
    def kind_spec(self) -> Kind:
        return KINDS[self.kind]

    def unit_factor(self, name: str) -> float:
        """Factor converting this profile's unit of ``name`` to the canonical unit."""
        f = self.kind_spec.field(name)
        if f.unit is None or name not in self.units:
            return 1.0
        return UNIT_FAMILIES[f.unit][self.units[name]]

    def matches(self, rel_path: str) -> bool:
        """True when the file (path relative to the ingest folder) matches the ``files`` globs."""
        if not self.files:
            return True
        rel = PurePosixPath(rel_path.replace("\\", "/"))
        return any(
            fnmatch.fnmatch(str(rel), g) or fnmatch.fnmatch(rel.name, g) or rel.match(g)
            for g in self.files
        )

    def captures(self, file_name: str) -> dict[str, str]:
        """Values captured from a file name by the profile's ``[filename] pattern``."""
        if not self.filename_pattern:
            return {}
        m = re.search(self.filename_pattern, file_name)
        if not m:
            return {}
        return {k: v for k, v in m.groupdict().items() if v is not None}


def _fail(
    path: str, key: str, value: Any, problem: str, allowed: Any = None
) -> ProfileError:
    msg = f"profile {path}: {key} = {value!r} {problem}"
    if allowed is not None:
        if isinstance(allowed, list | tuple):
            allowed = ", ".join(str(a) for a in allowed)
        msg += f"; allowed: {allowed}"
    return ProfileError(msg + ". Fix the profile file and run again.")


def _as_str(path: str, key: str, value: Any) -> str:
    if isinstance(value, bool) or not isinstance(value, str | int | float):
        raise _fail(path, key, value, "is not a text value")
    return str(value)


def _check_keys(
    path: str, section: str, data: dict[str, Any], allowed: tuple[str, ...]
) -> None:
    for key, value in data.items():
        if key not in allowed:
            where = f"{section}.{key}" if section else key
            raise _fail(path, where, value, "is not a profile field", allowed)


def parse_profile(data: dict[str, Any], path: str) -> Profile:
    """Validate a parsed TOML mapping into a :class:`Profile`.

    Raises
    ------
    ProfileError
        Unknown field, bad kind, unit, regular expression, time zone or format; the message names
        the profile file, the key and value, and lists what is allowed.
    """
    _check_keys(path, "", data, TOP_KEYS)
    kind = data.get("kind")
    if kind not in KINDS:
        raise _fail(path, "kind", kind, "is not a table kind", list(KINDS))
    spec = KINDS[kind]
    names = spec.names
    name = _as_str(path, "name", data.get("name", Path(path).stem))

    files_raw = data.get("files", ())
    files = (files_raw,) if isinstance(files_raw, str) else tuple(files_raw)
    for g in files:
        if not isinstance(g, str) or not g:
            raise _fail(path, "files", files_raw, "must be a glob or a list of globs")

    fmt = data.get("format")
    if fmt is not None and fmt not in FORMATS:
        raise _fail(path, "format", fmt, "is not a file format", FORMATS)
    delim = data.get("delimiter")
    if delim is not None:
        delim = _as_str(path, "delimiter", delim)
        if delim == "\\t":
            delim = "\t"
        if len(delim) != 1 or delim in '"\n\r':
            raise _fail(
                path,
                "delimiter",
                delim,
                "must be one character (not a quote or newline)",
            )
    decimal = data.get("decimal", ".")
    if decimal not in DECIMALS:
        raise _fail(path, "decimal", decimal, "is not a decimal mark", DECIMALS)
    enc = str(data.get("encoding", "utf-8")).lower()
    enc = _ENCODING_ALIASES.get(enc, enc)
    if enc not in ENCODINGS:
        raise _fail(
            path,
            "encoding",
            data.get("encoding"),
            "is not a supported encoding",
            ENCODINGS,
        )

    columns: dict[str, tuple[str, ...]] = {}
    cols_raw = data.get("columns", {})
    if not isinstance(cols_raw, dict):
        raise _fail(path, "columns", cols_raw, "must be a table [columns]")
    for key, value in cols_raw.items():
        if key not in names:
            raise _fail(
                path, f"columns.{key}", value, f"is not a column of {kind}", names
            )
        if isinstance(value, list):
            if spec.field(key).type != "timestamp" or not value or len(value) > 3:
                raise _fail(
                    path,
                    f"columns.{key}",
                    value,
                    "may be a list (joined with a space) only for a timestamp column, 1-3 names",
                )
            columns[key] = tuple(_as_str(path, f"columns.{key}", v) for v in value)
        else:
            columns[key] = (_as_str(path, f"columns.{key}", value),)

    units: dict[str, str] = {}
    for key, value in dict(data.get("units", {})).items():
        if key not in names:
            raise _fail(
                path, f"units.{key}", value, f"is not a column of {kind}", names
            )
        fam = spec.field(key).unit
        if fam is None:
            raise _fail(path, f"units.{key}", value, "names a column without a unit")
        if value not in UNIT_FAMILIES[fam]:
            raise _fail(
                path,
                f"units.{key}",
                value,
                f"is not a unit of {key}",
                list(UNIT_FAMILIES[fam]),
            )
        units[key] = value

    values: dict[str, dict[str, str]] = {}
    for key, mapping in dict(data.get("values", {})).items():
        if key not in names:
            raise _fail(
                path, f"values.{key}", mapping, f"is not a column of {kind}", names
            )
        if not isinstance(mapping, dict):
            raise _fail(
                path, f"values.{key}", mapping, "must be a table of code = value"
            )
        f = spec.field(key)
        out: dict[str, str] = {}
        for code, target in mapping.items():
            t = _as_str(path, f"values.{key}.{code}", target)
            if f.choices and t not in f.choices:
                raise _fail(
                    path, f"values.{key}.{code}", t, f"is not a {key}", f.choices
                )
            out[str(code)] = t
        values[key] = out

    constants: dict[str, str] = {}
    for key, value in dict(data.get("constants", {})).items():
        if key not in names:
            raise _fail(
                path, f"constants.{key}", value, f"is not a column of {kind}", names
            )
        if isinstance(value, bool):
            value = "true" if value else "false"
        constants[key] = _as_str(path, f"constants.{key}", value)
        if key in columns:
            raise _fail(
                path, f"constants.{key}", value, "is also mapped in [columns]; keep one"
            )

    pattern = None
    fn = data.get("filename", {})
    if isinstance(fn, str):
        fn = {"pattern": fn}
    if not isinstance(fn, dict):
        raise _fail(path, "filename", fn, "must be a table with a pattern")
    _check_keys(path, "filename", fn, FILENAME_KEYS)
    if "pattern" in fn:
        pattern = _as_str(path, "filename.pattern", fn["pattern"])
        try:
            rx = re.compile(pattern)
        except re.error as exc:
            raise _fail(
                path,
                "filename.pattern",
                pattern,
                f"is not a valid regular expression ({exc})",
                "Python regular expressions with named groups such as (?P<system_id>[A-Z0-9-]+)",
            ) from None
        if not rx.groupindex:
            raise _fail(
                path, "filename.pattern", pattern, "has no named group (?P<column>...)"
            )
        for g in rx.groupindex:
            if g not in names:
                raise _fail(
                    path,
                    "filename.pattern",
                    pattern,
                    f"captures group {g!r}, not a column of {kind}",
                    names,
                )

    time = data.get("time", {})
    if not isinstance(time, dict):
        raise _fail(path, "time", time, "must be a table [time]")
    _check_keys(path, "time", time, TIME_KEYS)
    formats_raw = time.get("formats", ())
    formats = (formats_raw,) if isinstance(formats_raw, str) else tuple(formats_raw)
    for f in formats:
        specs = re.findall(r"%(.)", f) if isinstance(f, str) else None
        if not specs or any(s not in _STRPTIME_SPECS for s in specs):
            raise _fail(
                path,
                "time.formats",
                f,
                "is not a strptime format",
                '%d %m %Y %y %H %M %S %f %z %b and literal text, e.g. "%d.%m.%Y %H:%M:%S"',
            )
    tz = _as_str(path, "time.timezone", time.get("timezone", "UTC"))
    if tz not in _timezones():
        raise _fail(
            path,
            "time.timezone",
            tz,
            "is not an IANA time zone",
            "names such as UTC, Europe/Berlin, America/New_York (see zoneinfo.available_timezones())",
        )
    amb = time.get("ambiguous", "order")
    if amb not in AMBIGUOUS_POLICIES:
        raise _fail(path, "time.ambiguous", amb, "is not a policy", AMBIGUOUS_POLICIES)

    return Profile(
        name=name,
        path=path,
        kind=kind,
        description=str(data.get("description", "")),
        files=files,
        format=fmt,
        delimiter=delim,
        decimal=decimal,
        encoding=enc,
        columns=columns,
        units=units,
        values=values,
        constants=constants,
        filename_pattern=pattern,
        time_formats=formats,
        timezone=tz,
        ambiguous=amb,
    )


@lru_cache(maxsize=1)
def _timezones() -> frozenset[str]:
    import zoneinfo

    return frozenset(zoneinfo.available_timezones() | {"UTC"})


def load_profile(path: str | Path) -> Profile:
    """Read and validate one profile file, or a built-in profile by name (see :func:`builtin_profiles`)."""
    p = Path(path)
    if not p.exists():
        builtins = builtin_profiles()
        if str(path) in builtins:
            return builtins[str(path)]
        raise ProfileError(
            f"profile {path} does not exist. Give a TOML file or a built-in profile name "
            f"({', '.join(sorted(builtins)) or 'none'}); list them with `tubetrack profiles`."
        )
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8-sig"))
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(
            f"profile {p}: not valid TOML ({exc}). Fix the file."
        ) from None
    except UnicodeDecodeError:
        raise ProfileError(f"profile {p}: not UTF-8 text. Save it as UTF-8.") from None
    return parse_profile(data, str(p))


def builtin_profiles() -> dict[str, Profile]:
    """Profiles shipped in ``tubetrack/profiles/*.toml``, by name."""
    out: dict[str, Profile] = {}
    root = resources.files("tubetrack") / "profiles"
    if not root.is_dir():
        return out
    for entry in sorted(root.iterdir(), key=lambda e: e.name):
        if entry.name.endswith(".toml"):
            data = tomllib.loads(entry.read_text(encoding="utf-8"))
            prof = parse_profile(data, f"tubetrack/profiles/{entry.name}")
            out[prof.name] = prof
    return out


def folder_profiles(folder: Path) -> list[Profile]:
    """Profiles auto-applied to a folder: ``FOLDER/profiles/*.toml`` (sorted by file name)."""
    pdir = folder / "profiles"
    if not pdir.is_dir():
        return []
    return [load_profile(p) for p in sorted(pdir.glob("*.toml"))]
