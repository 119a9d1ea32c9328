"""Read a TOML run configuration into frozen, validated settings objects.

A configuration file has one table per stage (``[catalogue]``, ``[randoms]``, ``[counts]``, ...),
each validated against the settings dataclass that the owning module declares with
:func:`corrpipe.settings.setting`. Optional ``[analyses.NAME]`` tables declare several analyses
(redshift bins, tracers) in one file; each one overrides any keys of the stage tables and is run
as part of one batch, in its own sub-folder of the output folder.

Example
-------
.. code-block:: toml

    [run]
    output = "out"

    [catalogue]
    path = "galaxies.fits"
    z_min = 0.4
    z_max = 0.7

    [analyses.low]
    catalogue = { z_max = 0.55 }

    [analyses.high]
    catalogue = { z_min = 0.55 }
"""

from __future__ import annotations

import dataclasses
import difflib
import types
import typing
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from corrpipe.errors import ConfigError
from corrpipe.settings import fingerprint_values, setting, setting_info, to_plain

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib  # type: ignore[no-redef]

__all__ = [
    "RunSettings",
    "AnalysisConfig",
    "RunConfig",
    "load_config",
    "parse_config",
    "section_classes",
    "config_reference",
    "validate_section",
    "load_mock_config",
    "suggest",
]


@dataclass(frozen=True)
class RunSettings:
    """Settings of the whole batch (the ``[run]`` table)."""

    output: str = setting("corrpipe_run", "output folder of the run (one sub-folder per analysis)",
                          path=True)
    seed: int = setting(20261201, "master random seed; every stage derives its own seed from it",
                        low=0)
    threads: int = setting(0, "number of threads for numba kernels and FFTs (0 = all cores)", low=0)
    progress: bool = setting(True, "show progress bars (the CLI's -q turns them off)")


def section_classes() -> dict[str, type]:
    """Return the mapping of config table name to its settings dataclass.

    ``[run]``, every per-analysis table, then the batch-scope tables (those may stand only at
    the top level, not in ``[analyses.NAME]``). The stage registry is asked at call time, not
    when this module is imported; stage modules never import the config loader.
    """
    from corrpipe.stages import batch_tables, config_tables

    classes = {"run": RunSettings}
    classes.update(config_tables())
    classes.update(batch_tables())
    return classes


def batch_table_names() -> tuple[str, ...]:
    """Names of the batch-scope config tables (top level only)."""
    from corrpipe.stages import batch_tables

    return tuple(batch_tables())


@dataclass(frozen=True)
class AnalysisConfig:
    """The validated settings of one analysis: one settings object per table."""

    name: str
    sections: Mapping[str, Any]
    raw: Mapping[str, Mapping[str, Any]]

    def __getattr__(self, item: str) -> Any:
        sections = object.__getattribute__(self, "sections")
        if item in sections:
            return sections[item]
        raise AttributeError(item)

    def section_dict(self, name: str) -> dict:
        """Return a table's validated values as a plain dict (for fingerprints)."""
        return fingerprint_values(self.sections[name])


@dataclass(frozen=True)
class RunConfig:
    """A whole validated configuration file."""

    path: Path | None
    text: str
    run: RunSettings
    analyses: tuple[AnalysisConfig, ...]
    batch: Mapping[str, Any] = dataclasses.field(default_factory=dict)

    def __getattr__(self, item: str) -> Any:
        batch = object.__getattribute__(self, "batch")
        if item in batch:
            return batch[item]
        raise AttributeError(item)

    def batch_section_dict(self, name: str) -> dict:
        """Return a batch-scope table's validated values as a plain dict (for fingerprints)."""
        return fingerprint_values(self.batch[name])

    def analysis(self, name: str) -> AnalysisConfig:
        """Return the analysis called ``name`` (with a suggestion if there is none)."""
        for a in self.analyses:
            if a.name == name:
                return a
        names = [a.name for a in self.analyses]
        raise ConfigError(
            f"{self.path or '<config>'}: no analysis named {name!r}; the config declares "
            f"{', '.join(names)}{suggest(name, names)}"
        )

    @property
    def output(self) -> Path:
        """The batch output folder."""
        return Path(self.run.output)

    def analysis_folder(self, analysis: AnalysisConfig) -> Path:
        """Folder of one analysis' stage files."""
        if len(self.analyses) == 1 and analysis.name == "main":
            return self.output
        return self.output / analysis.name


def load_config(path: str | Path, overrides: Mapping[str, Mapping[str, Any]] | None = None,
                classes: Mapping[str, type] | None = None,
                batch_classes: Mapping[str, type] | None = None) -> RunConfig:
    """Read and validate a TOML configuration file.

    Parameters
    ----------
    path : str or Path
        The TOML file. Relative paths inside it resolve against its folder.
    overrides : mapping, optional
        ``{table: {key: value}}`` applied on top of the file (e.g. from the command line).
    classes : mapping, optional
        Table name -> settings dataclass; defaults to :func:`section_classes`.

    Raises
    ------
    ConfigError
        If the file is missing, not valid TOML, or any value is invalid.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise ConfigError(f"config file {path} does not exist; give the path of a TOML file "
                          f"(see configs/ for examples)") from exc
    except OSError as exc:
        raise ConfigError(f"cannot read config file {path}: {exc}") from exc
    return parse_config(text, source=path, overrides=overrides, classes=classes,
                        batch_classes=batch_classes)


def parse_config(text: str, source: str | Path | None = None,
                 overrides: Mapping[str, Mapping[str, Any]] | None = None,
                 classes: Mapping[str, type] | None = None,
                 batch_classes: Mapping[str, type] | None = None) -> RunConfig:
    """Validate the TOML ``text`` of a configuration (see :func:`load_config`)."""
    where = str(source) if source is not None else "<config>"
    base_dir = Path(source).resolve().parent if source is not None else Path.cwd()
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{where}: not valid TOML: {exc}") from exc
    if overrides:
        for table, values in overrides.items():
            data.setdefault(table, {}).update(values)

    default_classes = classes is None
    if default_classes:
        classes = section_classes()
        batch_names = batch_table_names()
    else:
        classes = {"run": RunSettings, **classes, **(batch_classes or {})}
        batch_names = tuple(batch_classes or ())
    allowed_tables = list(classes) + ["analyses"]
    for table in data:
        if table not in allowed_tables:
            raise ConfigError(f"{where}: unknown table [{table}]{suggest(table, allowed_tables)}; "
                              f"allowed tables: {', '.join(allowed_tables)}")
        if not isinstance(data[table], dict):
            raise ConfigError(f"{where}: '{table}' must be a table ([{table}]), got "
                              f"{type(data[table]).__name__}")

    run = validate_section(RunSettings, data.get("run", {}), "run", where, base_dir)
    stage_tables = {k: v for k, v in data.items()
                    if k not in ("run", "analyses") and k not in batch_names}
    batch = {table: validate_section(classes[table], data.get(table, {}), table, where, base_dir)
             for table in batch_names}
    declared = data.get("analyses", {})
    if not declared:
        declared = {"main": {}}
    analyses = []
    for name, extra in declared.items():
        if not isinstance(extra, dict):
            raise ConfigError(f"{where}: [analyses.{name}] must be a table of stage tables")
        if not name.replace("-", "").replace("_", "").isalnum():
            raise ConfigError(f"{where}: analysis name {name!r} may contain only letters, digits, "
                              f"'-' and '_' (it names a folder)")
        sections, raw = {}, {}
        for table in extra:
            if table in batch_names:
                raise ConfigError(f"{where}: [analyses.{name}] cannot set '{table}': [{table}] "
                                  f"applies to the whole batch; set it at the top level")
            if table not in classes or table == "run":
                options = [t for t in classes if t != "run" and t not in batch_names]
                raise ConfigError(f"{where}: [analyses.{name}] has unknown table '{table}'"
                                  f"{suggest(table, options)}; it may override: "
                                  f"{', '.join(options)}")
            if not isinstance(extra[table], dict):
                raise ConfigError(f"{where}: [analyses.{name}].{table} must be a table")
        for table, cls in classes.items():
            if table == "run" or table in batch_names:
                continue
            merged = dict(stage_tables.get(table, {}))
            merged.update(extra.get(table, {}))
            label = table if name == "main" else f"analyses.{name}.{table}"
            sections[table] = validate_section(cls, merged, label, where, base_dir)
            raw[table] = merged
        analyses.append(AnalysisConfig(name=name, sections=types.MappingProxyType(sections),
                                       raw=types.MappingProxyType(raw)))
    config = RunConfig(path=Path(source) if source is not None else None, text=text, run=run,
                       analyses=tuple(analyses), batch=types.MappingProxyType(batch))
    if default_classes:
        _cross_checks(config, where)
    return config


def validate_section(cls: type, values: Mapping[str, Any], table: str, where: str,
                     base_dir: Path) -> Any:
    """Validate one table's values against the settings dataclass ``cls``.

    Unknown keys, wrong types, values outside the declared range or choices raise
    :class:`ConfigError` naming the file, the table and key, the bad value and what is allowed.
    """
    fields = {f.name: f for f in dataclasses.fields(cls) if f.init}
    hints = typing.get_type_hints(cls)
    for key in values:
        if key not in fields:
            raise ConfigError(f"{where}: [{table}] has unknown key '{key}'"
                              f"{suggest(key, list(fields))}; allowed keys: "
                              f"{', '.join(fields)}")
    kwargs = {}
    for name, f in fields.items():
        if name not in values:
            if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                info = setting_info(f)
                raise ConfigError(f"{where}: [{table}] needs '{name}' ({info['doc']})")
            info = setting_info(f)
            if info["path"] and isinstance(f.default, (str, tuple)) and f.default:
                kwargs[name] = _resolve_paths(f.default, base_dir)
            continue
        info = setting_info(f)
        label = f"[{table}] {name}"
        value = _coerce(values[name], hints[name], f"{where}: {label}")
        _check_range(value, info, f"{where}: {label}")
        if info["path"] and value is not None:
            value = _resolve_paths(value, base_dir)
        kwargs[name] = value
    try:
        obj = cls(**kwargs)
    except ConfigError:
        raise
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"{where}: [{table}]: {exc}") from exc
    check = getattr(obj, "validate", None)
    if callable(check):
        try:
            check()
        except ConfigError as exc:
            raise ConfigError(f"{where}: [{table}] {exc}") from exc
        except ValueError as exc:
            raise ConfigError(f"{where}: [{table}] {exc}") from exc
    return obj


def config_reference() -> str:
    """Return a text reference of every table and key: default, unit, allowed values, doc."""
    lines = []
    for table, cls in section_classes().items():
        lines.append(f"[{table}]")
        doc = (cls.__doc__ or "").strip().splitlines()
        if doc:
            lines.append(f"  # {doc[0]}")
        hints = typing.get_type_hints(cls)
        for f in dataclasses.fields(cls):
            if not f.init:
                continue
            info = setting_info(f)
            if f.default is not dataclasses.MISSING:
                default = _toml_value(to_plain(f.default))
            elif f.default_factory is not dataclasses.MISSING:
                default = _toml_value(to_plain(f.default_factory()))
            else:
                default = "(required)"
            extra = []
            if info["unit"]:
                extra.append(f"unit {info['unit']}")
            if info["choices"]:
                extra.append("one of " + ", ".join(map(repr, info["choices"])))
            rng = _range_text(info)
            if rng:
                extra.append(rng)
            lines.append(f"  {f.name} = {default}    # {_type_name(hints[f.name])}; "
                         f"{info['doc']}{'; ' + '; '.join(extra) if extra else ''}")
        lines.append("")
    return "\n".join(lines)


# ----------------------------------------------------------------------------- internals


def _toml_value(value: Any) -> str:
    """A default value written as TOML (unset optional values as ``(unset)``)."""
    if value is None:
        return "(unset)"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + "}"
    return repr(value)


def suggest(word: str, options: list[str]) -> str:
    """' (did you mean 'X'?)' for the closest of ``options`` to ``word``, else ''."""
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _type_name(tp: Any) -> str:
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        return " or ".join(_type_name(a) for a in typing.get_args(tp))
    if origin is tuple:
        args = typing.get_args(tp)
        if len(args) == 2 and args[1] is Ellipsis:
            return f"list of {_type_name(args[0])}"
        return "list [" + ", ".join(_type_name(a) for a in args) + "]"
    if origin is dict:
        k, v = typing.get_args(tp)
        return f"table of {_type_name(v)}"
    if tp is type(None):
        return "none"
    return getattr(tp, "__name__", str(tp))


def _coerce(value: Any, tp: Any, label: str) -> Any:
    """Check ``value`` against the annotation ``tp``; convert lists to tuples, ints to floats."""
    origin = typing.get_origin(tp)
    if tp is Any:
        return value
    if origin in (typing.Union, types.UnionType):
        args = typing.get_args(tp)
        if value is None or (isinstance(value, str) and value.lower() == "none"
                             and type(None) in args and str not in args):
            if type(None) in args:
                return None
        for a in args:
            if a is type(None):
                continue
            try:
                return _coerce(value, a, label)
            except ConfigError:
                continue
        raise ConfigError(f"{label} = {value!r}: expected {_type_name(tp)}")
    if origin is tuple:
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"{label} = {value!r}: expected {_type_name(tp)}, got "
                              f"{type(value).__name__}")
        args = typing.get_args(tp)
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_coerce(v, args[0], f"{label}[{i}]") for i, v in enumerate(value))
        if len(value) != len(args):
            raise ConfigError(f"{label} = {value!r}: expected {len(args)} values "
                              f"({_type_name(tp)}), got {len(value)}")
        return tuple(_coerce(v, a, f"{label}[{i}]") for i, (v, a) in enumerate(zip(value, args)))
    if origin is dict:
        kt, vt = typing.get_args(tp)
        if not isinstance(value, dict):
            raise ConfigError(f"{label} = {value!r}: expected a table ({{key = value}}), got "
                              f"{type(value).__name__}")
        return types.MappingProxyType(
            {str(k): _coerce(v, vt, f"{label}.{k}") for k, v in value.items()})
    if tp is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{label} = {value!r}: expected true or false")
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{label} = {value!r}: expected an integer, got "
                              f"{type(value).__name__}")
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{label} = {value!r}: expected a number, got "
                              f"{type(value).__name__}")
        return float(value)
    if tp is str:
        if not isinstance(value, str):
            raise ConfigError(f"{label} = {value!r}: expected a string (in quotes), got "
                              f"{type(value).__name__}")
        return value
    if tp is type(None):
        if value is not None:
            raise ConfigError(f"{label} = {value!r}: expected nothing")
        return None
    return value


def _range_text(info: dict) -> str:
    lo, hi = info["low"], info["high"]
    if lo is None and hi is None:
        return ""
    left = "(" if info["low_open"] else "["
    right = ")" if info["high_open"] else "]"
    return (f"range {left}{'-inf' if lo is None else lo}, {'inf' if hi is None else hi}{right}")


def _check_range(value: Any, info: dict, label: str) -> None:
    if value is None:
        return
    if isinstance(value, tuple):
        for i, v in enumerate(value):
            _check_range(v, info, f"{label}[{i}]")
        return
    if info["choices"] is not None and value not in info["choices"]:
        close = difflib.get_close_matches(str(value), [str(c) for c in info["choices"]], n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise ConfigError(f"{label} = {value!r} is not allowed; choose one of "
                          f"{', '.join(map(repr, info['choices']))}{hint}")
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        lo, hi = info["low"], info["high"]
        bad = False
        if lo is not None and (value < lo or (info["low_open"] and value == lo)):
            bad = True
        if hi is not None and (value > hi or (info["high_open"] and value == hi)):
            bad = True
        if value != value:  # NaN
            bad = True
        if bad:
            unit = f" {info['unit']}" if info["unit"] else ""
            raise ConfigError(f"{label} = {value!r}{unit} is out of range; allowed "
                              f"{_range_text(info)}{unit}")


def _resolve_paths(value: Any, base_dir: Path) -> Any:
    if isinstance(value, tuple):
        return tuple(_resolve_paths(v, base_dir) for v in value)
    if isinstance(value, str) and value:
        p = Path(value).expanduser()
        return str(p if p.is_absolute() else (base_dir / p))
    return value


def _cross_checks(config: RunConfig, where: str) -> None:
    """Checks that involve more than one table."""
    from corrpipe.stages import check_analysis

    for a in config.analyses:
        check_analysis(a, where)


def load_mock_config(path: str | Path) -> tuple[Any, Any]:
    """Read and validate a mock config: a ``[mock]`` table and an optional ``[cosmology]``.

    Returns
    -------
    (MockSettings, CosmologySettings or None)
        The ``[cosmology]`` table is the fiducial the expected dilations refer to.

    Raises
    ------
    ConfigError
        If the file is missing, not valid TOML, has other tables, or any value is invalid.
    """
    from corrpipe.cosmology import CosmologySettings
    from corrpipe.mocks import MockSettings

    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ConfigError(f"mock config {path} does not exist") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc
    unknown = [k for k in data if k not in ("mock", "cosmology")]
    if "mock" not in data or unknown:
        raise ConfigError(f"{path}: a mock config has a [mock] table (and optionally "
                          f"[cosmology] for the fiducial the expected dilation refers to); "
                          f"found {sorted(data)}")
    base = path.resolve().parent
    settings = validate_section(MockSettings, data["mock"], "mock", str(path), base)
    fiducial = None
    if "cosmology" in data:
        fiducial = validate_section(CosmologySettings, data["cosmology"], "cosmology",
                                    str(path), base)
    return settings, fiducial
