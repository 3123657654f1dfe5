"""The ``simfield`` command line checked before Hydra runs: every job composed and validated.

:func:`preflight` parses the command line as Hydra does (its argument parser and override
grammar), composes the configuration of every job (a ``-m`` sweep expanded as Hydra's basic
sweeper does, ``hydra.sweeper.params`` of ``+experiment=`` presets included), turns each into a
:class:`~simfield.config.Scenario` and checks the run's resources. Anything Hydra or OmegaConf
would reject is translated into a :class:`~simfield.errors.ConfigError` naming the key and
the value, so a refusal happens before any file or folder is written.
"""

from __future__ import annotations

import os
from pathlib import Path

from .config import (CONF_DIR, Scenario, _known_keys, check_raw_value, consistent_read_noise,
                     read_noise_conflict, register_configs, to_scenario)
from .errors import ConfigError, closest, did_you_mean, plain_type

__all__ = ["preflight"]

#: Flags that only print (help, configuration, info): Hydra handles them, nothing is run.
_PRINT_ONLY = ("help", "hydra_help", "cfg", "info", "shell_completion")


class _ArgError(Exception):
    pass


def _parse_args(argv: list[str]):
    from hydra._internal.utils import get_args_parser

    parser = get_args_parser()

    def error(message):
        raise _ArgError(message)

    parser.error = error
    try:
        return parser.parse_args(argv)
    except _ArgError as exc:
        raise ConfigError("command line", " ".join(argv), f"is not accepted: {exc}") from None


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _first_line(exc: BaseException) -> str:
    lines = [ln.strip() for ln in str(exc).splitlines() if ln.strip()]
    return lines[0] if lines else type(exc).__name__


def _split(text: str) -> tuple[str, str]:
    key, _, value = text.partition("=")
    return key.lstrip("+~"), value


def _parse_overrides(texts: list[str]) -> list:
    """Hydra's parse of each override; a syntax error names the override's key."""
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.errors import OverrideParseException

    parser = OverridesParser.create()
    out = []
    for text in texts:
        try:
            out.extend(parser.parse_overrides([text]))
        except OverrideParseException as exc:
            key, value = _split(text)
            raise ConfigError(key or text, value, "is not a valid override: "
                              f"{_one_line(exc.message)}") from None
    return out


def _check_overrides(overrides: list, groups: dict[str, list[str]]) -> None:
    """What the composition would accept silently: a preset group given a list (the last one
    wins), a boolean key given a number or a word (OmegaConf converts it)."""
    for o in overrides:
        if o.is_delete() or o.is_sweep_override():
            continue
        key, value = o.key_or_group, o.value()
        if key in groups:
            if not isinstance(value, str):
                raise ConfigError(key, o.get_value_element_as_str(),
                                  f"must be one preset, one of: {', '.join(groups[key])}")
        elif not key.startswith("hydra"):
            check_raw_value(key, value)


def _groups(conf_dir: str) -> dict[str, list[str]]:
    """Preset groups of the scenario: conf/<group>/*.yaml (not hydra's)."""
    out = {}
    for d in sorted(Path(conf_dir).iterdir()):
        if d.is_dir() and d.name not in ("hydra", "__pycache__"):
            out[d.name] = sorted(p.stem for p in d.glob("*.yaml"))
    return out


def _override_for(message: str, overrides: list):
    """The override a Hydra message is about: the one whose key it names (longest first)."""
    for o in sorted(overrides, key=lambda o: -len(o.key_or_group)):
        if o.input_line and o.input_line in message:
            return o
    for o in sorted(overrides, key=lambda o: -len(o.key_or_group)):
        if f"'{o.key_or_group}'" in message or o.key_or_group in message.split():
            return o
    return None


def _value_text(o) -> str:
    """An override's value as typed (a sweep's whole list, e.g. ``1,x``)."""
    if o.is_sweep_override():
        return _split(o.input_line)[1] if o.input_line else str(o.value())
    return o.get_value_element_as_str()


def _translate(exc: Exception, overrides: list) -> ConfigError:
    """A Hydra / OmegaConf composition error as a ConfigError naming the key and value."""
    from hydra.errors import MissingConfigException
    from omegaconf.errors import ConfigAttributeError, ConfigKeyError

    if isinstance(exc, MissingConfigException):
        missing = exc.missing_cfg_file or ""
        group, _, name = missing.rpartition("/")
        if exc.options:
            return ConfigError(group or "config", name, "is not a preset"
                               + did_you_mean(name, exc.options) + "; must be one of: "
                               + ", ".join(sorted(exc.options)))
        return ConfigError(group or "config", name, f"is not accepted: {_first_line(exc)}")
    cause = exc.__cause__
    text = f"{exc} {cause or ''}"
    o = _override_for(text, overrides)
    full_key = str(getattr(cause, "full_key", "") or "")
    key = o.key_or_group if o is not None else (full_key or "command line")
    value = _value_text(o) if o is not None and not o.is_delete() else \
        getattr(cause, "value", None)
    if isinstance(cause, (ConfigKeyError, ConfigAttributeError)) or "Could not override" in text:
        parent, _, last = key.rpartition(".")
        known = _known_keys(parent)
        if known:
            return ConfigError(key, value, f"is not a key of {parent or 'the scenario'}"
                               f"{did_you_mean(last, known)}; known keys: {', '.join(known)}")
        return ConfigError(key, value, "is not a known key" + _nearest_key(key))
    why = _first_line(cause) if cause is not None else _first_line(exc)
    return ConfigError(key, value, f"is not accepted: {plain_type(why)}")


def _nearest_key(key: str) -> str:
    """`` (did you mean a.b.c?)`` for a dotted ``key`` whose first unknown part is close to a
    key of its parent (the parts after it kept as typed), else ''."""
    parts = key.split(".")
    for i, part in enumerate(parts):
        known = _known_keys(".".join(parts[:i]))
        if part in known:
            continue
        near = closest(part, known)
        return f" (did you mean {'.'.join([*parts[:i], near, *parts[i + 1:]])}?)" \
            if near else ""
    return ""


def _check_read_noise_pair(job: list) -> None:
    """A job setting both detector.read_noise_e and read_noise_frame_e must set them
    consistently (CDS = sqrt(2) x frame); the scenario alone cannot tell an explicit
    read_noise_e equal to its preset value from an untouched one."""
    given = {o.key_or_group: o.value() for o in job
             if not o.is_delete() and not o.is_sweep_override()}
    cds, frame = given.get("detector.read_noise_e"), given.get("detector.read_noise_frame_e")
    numbers = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in (cds, frame))
    if numbers and not consistent_read_noise(float(cds), float(frame)):
        raise read_noise_conflict(float(cds), float(frame))


def _sweep_jobs(hy, config_name: str, overrides: list[str]) -> list[list[str]]:
    """Override lists of every job of a multirun, as Hydra's basic sweeper makes them."""
    from hydra._internal.core_plugins.basic_sweeper import BasicSweeper
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.types import RunMode
    from omegaconf import OmegaConf

    master = hy.compose_config(config_name, overrides, run_mode=RunMode.MULTIRUN,
                               with_log_configuration=False)
    sweeper = OmegaConf.to_container(master.hydra.sweeper, resolve=False)
    params = [f"{k}={v}" for k, v in (sweeper.get("params") or {}).items()]
    task = list(master.hydra.overrides.task)
    parser = OverridesParser.create(config_loader=hy.config_loader)
    batches = BasicSweeper.split_arguments(parser.parse_overrides(params + task), None)
    hydra_overrides = list(master.hydra.overrides.hydra)
    return [hydra_overrides + job for batch in batches for job in batch]


#: Compositions of the preset choices alone, by (folder, config name, group overrides): Hydra
#: applies the value overrides after composing the presets, so each job's configuration is
#: a copy of one of these with its value overrides applied the way Hydra applies them.
#: Each is kept with its pickle: unpickling makes the copy (OmegaConf's own serialisation,
#: which keeps every node, flag and type) about four times faster than ``copy.deepcopy``.
_BASES: dict[tuple, tuple[object, bytes]] = {}
_MAX_BASES = 64


def _unknown_preset(hy, groups: list):
    """The error Hydra's composition of ``groups`` raises when exactly one of them, a plain
    ``group=name`` override, names a preset its group does not have; None when only composing
    can tell. Hydra's composition would first load every preset file (~0.3 s); this asks the
    same repository for the group's options (Hydra's message lists them)."""
    import re

    from hydra.core.object_type import ObjectType
    from hydra.errors import MissingConfigException

    if any(o.key_or_group == "hydra.searchpath" or o.key_or_group.startswith("hydra")
           or o.is_add() or o.is_force_add() or o.is_delete() or o.is_sweep_override()
           or o.package is not None for o in groups):
        return None
    repo = hy.config_loader.repository
    unknown = []
    for o in groups:
        value = o.value()
        if not isinstance(value, str) or not re.fullmatch(r"[A-Za-z0-9_-]+", value):
            return None
        options = repo.get_group_options(o.key_or_group, ObjectType.CONFIG)
        if value not in options:
            if not options:
                return None
            unknown.append((o, options))
    if len(unknown) != 1:
        return None
    o, options = unknown[0]
    path = f"{o.key_or_group}/{o.value()}"
    return MissingConfigException(missing_cfg_file=path, options=options,
                                  message=f"Could not find '{path}'")


def _cached(hy, conf_dir: str, config_name: str, groups: list) -> tuple[object, bytes]:
    import pickle

    from hydra.types import RunMode

    key = (conf_dir, config_name, tuple(o.input_line for o in groups))
    if key not in _BASES:
        missing = _unknown_preset(hy, groups)
        if missing is not None:
            raise missing
        if len(_BASES) >= _MAX_BASES:
            _BASES.clear()
        cfg = hy.compose_config(config_name, list(key[2]), run_mode=RunMode.MULTIRUN,
                                with_log_configuration=False, validate_sweep_overrides=False)
        _BASES[key] = (cfg, pickle.dumps(cfg, protocol=pickle.HIGHEST_PROTOCOL))
    return _BASES[key]


def _base(hy, conf_dir: str, config_name: str, groups: list):
    """The remembered composition of the presets ``groups`` (read it, do not change it)."""
    return _cached(hy, conf_dir, config_name, groups)[0]


def _split_groups(hy, parsed: list) -> tuple[list, list]:
    """(preset overrides, value overrides), as Hydra's defaults list tells them apart."""
    repo = hy.config_loader.repository
    groups, values = [], []
    for o in parsed:
        is_group = o.key_or_group == "hydra.searchpath" or repo.group_exists(o.key_or_group)
        (groups if is_group else values).append(o)
    return groups, values


def _compose(hy, conf_dir: str, config_name: str, parsed: list):
    """One job's configuration: its presets composed (remembered), then its value overrides
    applied with Hydra's own function, in order, as Hydra's composition does."""
    import pickle

    from hydra._internal.config_loader_impl import ConfigLoaderImpl

    groups, values = _split_groups(hy, parsed)
    cfg = pickle.loads(_cached(hy, conf_dir, config_name, groups)[1])  # a fresh copy
    ConfigLoaderImpl._apply_overrides_to_config(values, cfg)
    return cfg


def _jobs(hy, conf_dir: str, config_name: str, texts: list[str], parsed: list,
          multirun: bool):
    """Composed configuration (without its ``hydra`` node) of every job of the command line."""
    from omegaconf import OmegaConf, open_dict

    groups, values = _split_groups(hy, parsed)
    mode = OmegaConf.select(_base(hy, conf_dir, config_name, groups), "hydra.mode")
    for o in values:
        if o.key_or_group == "hydra.mode" and not o.is_sweep_override():
            mode = o.value()
    sweeps = [o for o in parsed if o.is_sweep_override()]
    if multirun or str(mode) in ("MULTIRUN", "RunMode.MULTIRUN"):
        jobs = [_parse_overrides(job) for job in _sweep_jobs(hy, config_name, texts)]
    elif sweeps:
        raise ConfigError(sweeps[0].key_or_group, _split(sweeps[0].input_line)[1],
                          "is a sweep: run it with -m (or give a single value)")
    else:
        jobs = [parsed]
    for job in jobs:
        _check_read_noise_pair(job)
        cfg = _compose(hy, conf_dir, config_name, job)
        with open_dict(cfg):
            del cfg["hydra"]  # its interpolations resolve only inside a Hydra run
        yield cfg


def check_run_folder(argv: list[str]) -> None:
    """Refuse a ``simfield`` command line whose run folder (``hydra.run.dir``, or
    ``hydra.sweep.dir`` with ``-m``) cannot be made or written: its fixed part, before any
    ``${...}``, is checked (:func:`simfield.resources.check_writable_folder`; creates
    nothing). Hydra would otherwise fail making it, with a traceback."""
    from .resources import check_writable_folder

    args = _parse_args(list(argv))
    if any(getattr(args, flag, None) for flag in _PRINT_ONLY):
        return
    key = "hydra.sweep.dir" if args.multirun else "hydra.run.dir"
    given = [o for o in _parse_overrides(list(args.overrides))
             if o.key_or_group == key and not o.is_sweep_override()]
    text = str(given[-1].value()) if given else ("multirun" if args.multirun else "outputs")
    check_writable_folder(key, text.split("${", 1)[0] or ".")


def preflight(argv: list[str], check: bool = True) -> list[Scenario]:
    """Validate a ``simfield`` command line without running it or writing anything.

    Parameters
    ----------
    argv : list of str
        The arguments after ``simfield`` (flags and Hydra overrides).
    check : bool
        Also refuse runs that would fail later or exceed ``limits``
        (:func:`simfield.resources.check_run`).

    Returns
    -------
    list of Scenario
        One per job (empty for flags that only print, e.g. ``--help``, ``--cfg job``).

    Raises
    ------
    ConfigError
        The first bad setting of any job, naming its key and value.
    """
    from hydra import initialize_config_dir
    from hydra.core.global_hydra import GlobalHydra
    from hydra.errors import HydraException
    from omegaconf.errors import OmegaConfBaseException

    from .resources import check_run

    args = _parse_args(list(argv))
    if any(getattr(args, flag, None) for flag in _PRINT_ONLY):
        return []
    conf_dir = CONF_DIR
    if args.config_path:
        conf_dir = os.path.join(os.path.dirname(os.path.abspath(__file__)), args.config_path)
    texts = list(args.overrides)
    if args.config_dir:
        texts.append(f"hydra.searchpath=[file://{os.path.abspath(args.config_dir)}]")
    parsed = _parse_overrides(texts)
    _check_overrides(parsed, _groups(conf_dir))
    register_configs()
    out = []
    try:
        with initialize_config_dir(conf_dir, version_base=None, job_name="simfield"):
            hy = GlobalHydra.instance().hydra
            for cfg in _jobs(hy, conf_dir, args.config_name or "config", texts, parsed,
                             args.multirun):
                sc = to_scenario(cfg)
                if check:
                    check_run(sc)
                out.append(sc)
    except (HydraException, OmegaConfBaseException) as exc:
        raise _translate(exc, parsed) from None
    return out
