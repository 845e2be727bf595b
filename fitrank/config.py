"""One TOML file drives a run: the sections, their keys, defaults and checks.

A config file has up to seven tables; every key is optional except
``data.edges`` and ``data.pairs``::

    [data]        where the tables are and how pairs are split
    [graph]       damping, teleport source, dangling policy, solver tolerance
    [weighting]   which parameterisation of the edge weights
    [reduction]   how the reduced model is built (offline stage)
    [training]    loss, optimiser, stopping, regularisation, seeds
    [check]       tolerances of the full-solve check and enrichment rounds
    [output]      where the run folder goes

Relative paths in the file are resolved against the file's folder; paths given
with ``--set`` against the current directory (where they were typed).
Overrides ``--set section.key=value`` take a TOML value (``0.01``, ``true``,
``"text"``, ``[0.8, 0.1, 0.1]``); a value that is not valid TOML is taken as
a bare string, so ``--set training.loss=sigmoid`` works unquoted.

Every problem is a :class:`fitrank.errors.ConfigError` naming the dotted key
(``training.learning_rate``) and what is wrong. :func:`effective_config`
renders a config back to TOML (every key, with its meaning as a comment) and
:func:`config_reference_markdown` renders the key reference for the README;
both come from the same field declarations below, which are the only place a
default or a meaning is written.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from fitrank.errors import ConfigError, FitrankInputError
from fitrank.losses import LOSSES, get_loss
from fitrank.objective import ObjectiveSpec
from fitrank.pagerank import DANGLING_POLICIES
from fitrank.reduced import METHODS as REDUCTION_METHODS, ReductionSettings
from fitrank.train import OPTIMIZERS, LoopSettings
from fitrank.weightings import KINDS

AUTO = "auto"
"""The value of an optional number that fitrank chooses itself (rendered and accepted as ``"auto"``)."""

_LOOP = LoopSettings()
_REDUCTION = ReductionSettings()


def _key(default, doc: str, kind: str, *, choices: tuple | None = None, low: float | None = None,
         high: float | None = None, low_open: bool = False, high_open: bool = False, required: bool = False):
    """Declare one config key.

    Args:
      default: its default (None for an ``"auto"`` number, an absent path or a required key).
      doc: one-line meaning, shown in the reference and the effective config.
      kind: ``str``, ``int``, ``float``, ``bool``, ``path``, ``path?`` (may be
        ``""``: none), ``int?``/``float?`` (may be ``"auto"``) or ``fractions``
        (three numbers >= 0 summing to 1).
      choices: allowed values of a ``str`` key.
      low, high, low_open, high_open: allowed range of a number.
      required: the key has no default and must be given.
    """
    meta = {"doc": doc, "kind": kind, "choices": choices, "low": low, "high": high, "low_open": low_open,
            "high_open": high_open, "required": required}
    return field(default=default, metadata=meta)


@dataclass(frozen=True)
class DataSection:
    edges: Path | None = _key(None, "edge table (CSV or Parquet): source, target, optional relation, weight, "
                                    "features", "path", required=True)
    pairs: Path | None = _key(None, "pair table: preferred, other, optional weight, split", "path", required=True)
    nodes: Path | None = _key(None, "optional node table (node, teleport); \"\" for none", "path?")
    split: tuple = _key((0.7, 0.15, 0.15), "train, valid, test fractions for pairs without a split column",
                        "fractions")


@dataclass(frozen=True)
class GraphSection:
    damping: float = _key(0.85, "PageRank damping alpha", "float", low=0.0, high=1.0, low_open=True,
                          high_open=True)
    teleport: str = _key("nodes", "teleport distribution: \"nodes\" = the node table's teleport column when "
                                  "given, else uniform; \"uniform\" = always uniform", "str",
                         choices=("nodes", "uniform"))
    dangling: str = _key("teleport", "where mass leaking from a node without out-weight goes", "str",
                         choices=DANGLING_POLICIES)
    solver_tol: float = _key(1e-10, "certified L1 error of the full PageRank solves (the check's at most "
                                    "1e-10; full-space training; snapshots: reduction.snapshot_tol)", "float", low=0.0,
                             low_open=True, high=1.0)


@dataclass(frozen=True)
class WeightingSection:
    kind: str = _key("scale", "edge-weight parameterisation: mixture (softmax relation mixture), scale "
                              "(per-relation scale), features (log-linear in edge features)", "str", choices=KINDS)
    bound: float | None = _key(None, "half-width of the parameter box sampled offline (scale, features), at most "
                                     "50 (relation weights e^100 apart, far beyond any useful weighting); "
                                     "\"auto\" = the weighting's own (1.5 for scale, 0.7 / sqrt(features) for "
                                     "features)", "float?", low=0.0, low_open=True, high=50.0)


@dataclass(frozen=True)
class ReductionSection:
    method: str = _key(_REDUCTION.method, "reduced model: galerkin (mixture only), interpolation (any), auto "
                                          "(galerkin when the weighting is affine)", "str",
                       choices=REDUCTION_METHODS)
    samples: int = _key(_REDUCTION.samples, "parameter points solved in full to build the basis", "int", low=2)
    rank: int | None = _key(None, "basis size k (never more than the snapshots' numerically independent "
                            "directions); \"auto\" = smallest k whose lost energy is <= energy", "int?",
                            low=1)
    energy: float = _key(_REDUCTION.energy, "tolerance on the lost snapshot energy 1 - sum_{i<=k} s_i^2 / "
                                            "sum s_i^2", "float", low=0.0, high=1.0, low_open=True, high_open=True)
    max_rank: int = _key(_REDUCTION.max_rank, "largest basis size the energy rule may choose", "int", low=1)
    rows: int | None = _key(None, "interpolation rows r (>= k); \"auto\" = 2 k", "int?", low=1)
    gamma: float | None = _key(None, "cost weight of row choice: score = remaining norm / (1 + gamma * edges "
                                     "needed / mean edges needed); 0 = pure pivoted QR (favours hubs); \"auto\" = "
                                     "0.25 for mixture and scale, 4 for features", "float?", low=0.0)
    edge_budget: int = _key(0, "most edges the interpolation rows may touch; 0 = no budget", "int", low=0)
    seed: int = _key(_REDUCTION.seed, "seed of the parameter sampling", "int", low=0)
    snapshot_tol: float = _key(_REDUCTION.snapshot_tol, "certified L1 error of each snapshot solve (the "
                               "basis keeps less detail than this)", "float", low=0.0, low_open=True)
    regions: int = _key(_REDUCTION.regions, "local models, each with its own basis for one region of the "
                                            "parameter domain (1 = one global model); more regions reach the "
                                            "same accuracy with a smaller k, given more samples", "int", low=1)
    workers: int = _key(1, "processes for the full solves of the offline stage (the model is bit-identical for "
                           "any number)", "int", low=1)
    model: Path | None = _key(None, "reduced-model file to reuse or create; \"\" = model.npz in the run folder",
                              "path?")
    snapshot_file: Path | None = _key(None, "memory-mapped .npy file for the snapshot matrix (for graphs whose "
                                            "n x samples matrix should not sit in RAM); \"\" = in memory. An "
                                            "existing file is replaced only when it holds a 2-d float64 matrix, as "
                                            "fitrank writes; any other file there is refused", "path?")


@dataclass(frozen=True)
class TrainingSection:
    space: str = _key("reduced", "where to train: reduced (the reduced model) or full (full solves and "
                                 "adjoint gradients, the slow reference)", "str", choices=("reduced", "full"))
    loss: str = _key("logistic", "pair loss on the margin z = s_other - s_preferred, s = n x", "str",
                     choices=tuple(LOSSES))
    temperature: float | None = _key(None, "temperature beta of the sigmoid and logistic losses; \"auto\" = 0.1 x "
                                           "the median |s_other - s_preferred| of the training pairs at theta0",
                                     "float?", low=0.0, low_open=True)
    margin: float | None = _key(None, "margin of the squared hinge loss; \"auto\" as for temperature", "float?",
                                low=0.0)
    regularization: float = _key(1e-3, "lambda of the penalty lambda ||theta - theta0||^2", "float", low=0.0)
    optimizer: str = _key(_LOOP.optimizer, "lbfgs (line search), adam or sgd", "str", choices=OPTIMIZERS)
    learning_rate: float = _key(_LOOP.learning_rate, "step size of adam and sgd (lbfgs ignores it)", "float",
                                low=0.0, low_open=True)
    steps: int = _key(_LOOP.max_steps, "most parameter updates", "int", low=0)
    grad_tol: float = _key(_LOOP.grad_tol, "stop when the gradient norm is at most this", "float", low=0.0)
    patience: int = _key(_LOOP.patience, "stop after this many steps without better validation accuracy; "
                                         "0 = never", "int", low=0)
    batch_pairs: int = _key(_LOOP.batch_pairs, "adam/sgd: random pairs per step; 0 = all", "int", low=0)
    seed: int = _key(_LOOP.seed, "seed of the pair batches", "int", low=0)
    split_seed: int = _key(0, "seed of the random train/valid/test split of pairs without a split column",
                           "int", low=0)

    def objective_spec(self) -> ObjectiveSpec:
        """The loss and regularisation as an :class:`fitrank.objective.ObjectiveSpec` ("auto" -> None)."""
        param = getattr(self, get_loss(self.loss).param_name)
        return ObjectiveSpec(self.loss, param, self.regularization)

    def loop_settings(self) -> LoopSettings:
        """The optimiser and stopping rules as a :class:`fitrank.train.LoopSettings`."""
        return LoopSettings(optimizer=self.optimizer, learning_rate=self.learning_rate, max_steps=self.steps,
                            grad_tol=self.grad_tol, patience=self.patience, batch_pairs=self.batch_pairs,
                            seed=self.seed)


@dataclass(frozen=True)
class CheckSection:
    top_k: int = _key(100, "k of the top-k accuracy measures", "int", low=1)
    tau_min: float = _key(0.999, "the check passes when Kendall tau on the top-k is at least this ...", "float",
                          low=-1.0, high=1.0)
    l1_max: float = _key(1e-3, "... and the normalised L1 error on the top-k at most this", "float", low=0.0)
    enrich_rounds: int = _key(2, "most enrichment rounds when the check fails", "int", low=0)
    path_points: int = _key(0, "extra points of the optimisation path added to the snapshots per round", "int",
                            low=0)
    build_points: int = _key(4, "fresh parameter points (past the samples) at which fitrank build compares the "
                                "new model with full solves, reporting the worst tau, L1 and certified bound "
                                "against tau_min and l1_max; 0 = none", "int", low=0)


@dataclass(frozen=True)
class OutputSection:
    folder: Path = _key(Path("run"), "run folder (relative to the config file)", "path")
    plots: bool = _key(True, "write the PNG plots", "bool")


SECTIONS: dict[str, type] = {
    "data": DataSection,
    "graph": GraphSection,
    "weighting": WeightingSection,
    "reduction": ReductionSection,
    "training": TrainingSection,
    "check": CheckSection,
    "output": OutputSection,
}


@dataclass(frozen=True)
class Config:
    """A validated run configuration, one attribute per section; ``source`` is the file it came from."""

    data: DataSection
    graph: GraphSection = GraphSection()
    weighting: WeightingSection = WeightingSection()
    reduction: ReductionSection = ReductionSection()
    training: TrainingSection = TrainingSection()
    check: CheckSection = CheckSection()
    output: OutputSection = OutputSection()
    source: Path | None = None


# --------------------------------------------------------------------------- loading


def load_config(path: str | Path, overrides: list[str] | tuple[str, ...] = (), *, check_files: bool = True) -> Config:
    """Read, override and validate a config file.

    Args:
      path: the TOML file.
      overrides: ``"section.key=value"`` strings applied in order.
      check_files: also require the data files to exist.

    Returns:
      The :class:`Config`, with absolute paths.

    Raises:
      ConfigError: a key is unknown, missing, of the wrong type or out of range.
      FitrankInputError: the file is missing or is not valid TOML.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise FitrankInputError(f"{path}: config file not found") from None
    except (OSError, UnicodeDecodeError) as err:
        raise FitrankInputError(f"{path}: cannot read the config file ({err})") from None
    try:
        raw = tomllib.loads(text.removeprefix("\ufeff"))  # a byte-order mark, as some editors save UTF-8
    except tomllib.TOMLDecodeError as err:
        raise FitrankInputError(f"{path}: not valid TOML: {err}") from None
    return parse_config(raw, base_dir=path.resolve().parent, source=path.resolve(), overrides=overrides,
                        check_files=check_files)


def parse_config(raw: dict, *, base_dir: str | Path = ".", source: str | Path | None = None,
                 overrides: list[str] | tuple[str, ...] = (), check_files: bool = False) -> Config:
    """Validate a parsed TOML mapping (e.g. from ``tomllib.loads``) into a :class:`Config`.

    Args:
      raw: ``{section: {key: value}}``.
      base_dir: folder that relative paths in ``raw`` are resolved against.
      source: where ``raw`` came from (named in error messages).
      overrides: ``"section.key=value"`` strings; their relative paths resolve
        against the current directory.
      check_files: require the data files to exist.

    Returns:
      The :class:`Config`.
    """
    where = str(source) if source is not None else None
    raw = _check_layout(raw, where)
    origin = {}  # dotted key -> (folder for relative paths, name for messages)
    for dotted in (f"{s}.{k}" for s, table in raw.items() for k in table):
        origin[dotted] = (Path(base_dir), where)
    for text in overrides:
        section, key, value = parse_override(text)
        raw.setdefault(section, {})[key] = value
        origin[f"{section}.{key}"] = (Path.cwd(), "--set")
    built = {}
    for section, cls in SECTIONS.items():
        values = {}
        for f in fields(cls):
            dotted = f"{section}.{f.name}"
            if f.name in raw.get(section, {}):
                folder, name = origin[dotted]
                values[f.name] = _convert(dotted, raw[section][f.name], f.metadata, folder, name)
            elif f.metadata["required"]:
                raise ConfigError(dotted, f"missing; give the {f.metadata['doc'].split(':')[0]}", where)
            elif f.metadata["kind"] == "path" and not Path(f.default).is_absolute():
                values[f.name] = Path(base_dir).resolve() / f.default
        built[section] = cls(**values)
    config = Config(**built, source=Path(source) if source is not None else None)
    _check_together(config, where)
    if check_files:
        for name in ("edges", "pairs", "nodes"):
            target = getattr(config.data, name)
            if target is not None and not target.is_file():
                problem = (f"{target} is a folder; give the table file itself" if target.is_dir()
                           else f"file not found: {target}")
                raise ConfigError(f"data.{name}", problem, where)
    return config


def parse_override(text: str) -> tuple[str, str, Any]:
    """Split ``"section.key=value"`` into (section, key, value).

    The value is read as a TOML value; text that is not valid TOML is taken as
    a bare string. The key is checked against the known sections and keys.
    """
    dotted, sep, value_text = text.partition("=")
    dotted = dotted.strip()
    if not sep:
        raise ConfigError(dotted or text, "an override must look like section.key=value", "--set")
    section, dot, key = dotted.partition(".")
    if not dot or "." in key:
        raise ConfigError(dotted, "an override key must be section.key, e.g. training.learning_rate", "--set")
    _known_key(section, key, "--set")
    value_text = value_text.strip()
    if not value_text:
        raise ConfigError(dotted, "no value after '='", "--set")
    try:
        value = tomllib.loads(f"value = {value_text}")["value"]
    except tomllib.TOMLDecodeError:
        value = value_text
    return section, key, value


def _check_layout(raw: dict, where: str | None) -> dict:
    """A copy of ``raw`` after refusing unknown sections/keys and non-table sections."""
    checked = {}
    for section, table in raw.items():
        if section not in SECTIONS:
            if not isinstance(table, dict):
                raise ConfigError(section, "keys belong inside a section such as [training]; "
                                           f"sections: {', '.join(SECTIONS)}", where)
            raise ConfigError(section, f"unknown section{_suggest(section, SECTIONS)}; "
                                       f"sections: {', '.join(SECTIONS)}", where)
        if not isinstance(table, dict):
            raise ConfigError(section, f"must be a table [{section}], not a value", where)
        for key, value in table.items():
            _known_key(section, key, where)
            if isinstance(value, dict):
                raise ConfigError(f"{section}.{key}", "must be a value, not a table", where)
        checked[section] = dict(table)
    return checked


def _known_key(section: str, key: str, where: str | None) -> None:
    if section not in SECTIONS:
        raise ConfigError(f"{section}.{key}", f"unknown section '{section}'{_suggest(section, SECTIONS)}; "
                                              f"sections: {', '.join(SECTIONS)}", where)
    names = [f.name for f in fields(SECTIONS[section])]
    if key not in names:
        raise ConfigError(f"{section}.{key}", f"unknown key{_suggest(key, names)}; keys of [{section}]: "
                                              f"{', '.join(names)}", where)


def _suggest(word: str, known) -> str:
    close = difflib.get_close_matches(word, list(known), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


_KIND_WORDS = {
    "str": "a string", "int": "an integer", "float": "a number", "bool": "true or false", "path": "a path string",
    "path?": "a path string (\"\" for none)", "int?": "an integer or \"auto\"", "float?": "a number or \"auto\"",
    "fractions": "a list of three numbers",
}


def _convert(dotted: str, value: Any, meta: dict, folder: Path, where: str | None) -> Any:
    """One raw TOML value -> its typed, checked form; ConfigError naming ``dotted`` otherwise."""
    kind = meta["kind"]

    def fail(problem: str):
        return ConfigError(dotted, problem, where)

    def wrong_type():
        return fail(f"expected {_KIND_WORDS[kind]}, got {_show(value)}")

    if kind in ("int?", "float?") and value == AUTO:
        return None
    if kind == "path?" and value == "":
        return None
    if kind == "bool":
        if not isinstance(value, bool):
            raise wrong_type()
        return value
    if kind == "str":
        if not isinstance(value, str):
            raise wrong_type()
        if meta["choices"] and value not in meta["choices"]:
            raise fail(f"'{value}' is not one of {', '.join(meta['choices'])}{_suggest(value, meta['choices'])}")
        return value
    if kind in ("path", "path?"):
        if not isinstance(value, str) or not value.strip():
            raise wrong_type() if not isinstance(value, str) else fail("the path is empty")
        target = Path(value).expanduser()
        return (target if target.is_absolute() else folder / target).resolve()
    if kind == "fractions":
        if not (isinstance(value, list) and len(value) == 3 and all(_is_number(v) for v in value)):
            raise wrong_type()
        fractions = tuple(float(v) for v in value)
        if any(not math.isfinite(v) or v < 0 for v in fractions) or abs(sum(fractions) - 1.0) > 1e-9:
            raise fail(f"fractions must be >= 0 and sum to 1, got {list(value)}")
        if fractions[0] <= 0:
            raise fail("the train fraction must be > 0")
        return fractions
    if kind in ("int", "int?"):
        if isinstance(value, bool) or not isinstance(value, int):
            raise wrong_type()
    elif kind in ("float", "float?"):
        if not _is_number(value):
            raise wrong_type()
        value = float(value)
        if not math.isfinite(value):
            raise fail(f"must be finite, got {value}")
    _check_range(value, meta, fail)
    return value


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _check_range(value, meta: dict, fail) -> None:
    low, high = meta["low"], meta["high"]
    if low is not None and (value <= low if meta["low_open"] else value < low):
        raise fail(f"must be {'>' if meta['low_open'] else '>='} {low:g}, got {value}")
    if high is not None and (value >= high if meta["high_open"] else value > high):
        raise fail(f"must be {'<' if meta['high_open'] else '<='} {high:g}, got {value}")


def _show(value) -> str:
    kind = {bool: "boolean", int: "integer", float: "number", str: "string", list: "list"}.get(type(value),
                                                                                              type(value).__name__)
    return f"{kind} {value!r}" if not isinstance(value, str) else f"string '{value}'"


def _check_together(config: Config, where: str | None) -> None:
    """Rules that involve more than one key."""
    red, train = config.reduction, config.training
    if red.method == "galerkin" and config.weighting.kind != "mixture":
        raise ConfigError("reduction.method", f"galerkin needs an affine weighting (kind = \"mixture\"), not "
                                              f"\"{config.weighting.kind}\"; use \"interpolation\" or \"auto\"", where)
    if red.rank is not None and red.rank > red.samples:
        raise ConfigError("reduction.rank", f"rank {red.rank} exceeds samples {red.samples}: the basis cannot "
                                            "be larger than the snapshot set", where)
    if red.regions > red.samples:
        raise ConfigError("reduction.regions", f"{red.regions} regions need at least as many samples (got "
                                               f"{red.samples})", where)
    if red.rank is not None and red.rows is not None and red.rows < red.rank:
        raise ConfigError("reduction.rows", f"rows {red.rows} must be >= rank {red.rank}", where)
    if train.batch_pairs > 0 and train.optimizer == "lbfgs":
        raise ConfigError("training.batch_pairs", "pair batches need optimizer adam or sgd: the lbfgs line "
                                                  "search needs the same objective at every trial point", where)


# --------------------------------------------------------------------------- rendering


def with_overrides(config: Config, overrides: list[str] | tuple[str, ...]) -> Config:
    """``config`` with ``"section.key=value"`` overrides applied and everything checked again."""
    raw = tomllib.loads(effective_config(config))
    return parse_config(raw, base_dir=Path.cwd(), source=config.source, overrides=overrides)


def effective_config(config: Config) -> str:
    """The complete config as TOML: every key of every section, its meaning as a comment.

    Reading the text back (``parse_config(tomllib.loads(text))``) gives an equal
    config: paths are absolute and "auto" / "" stand for unset optional keys.
    """
    lines = ["# fitrank effective configuration: every key, defaults included."]
    if config.source is not None:
        lines.append(f"# read from {_toml_string(str(config.source))}")
    for section in SECTIONS:
        lines += ["", f"[{section}]"]
        values = getattr(config, section)
        for f in fields(values):
            lines.append(f"# {f.metadata['doc']}")
            lines.append(f"{f.name} = {_toml_value(getattr(values, f.name), f.metadata['kind'])}")
    return "\n".join(lines) + "\n"


def _toml_value(value, kind: str) -> str:
    if value is None:
        return '""' if kind.startswith("path") else f'"{AUTO}"'
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        text = repr(value)  # shortest text that reads back to the same double
        return text if any(c in text for c in ".en") else text + ".0"
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(_toml_value(v, kind) for v in value) + "]"
    return _toml_string(str(value))


def _toml_string(text: str) -> str:
    """A TOML basic string (double quotes, backslash escapes) holding ``text`` exactly."""
    named = {'"': '\\"', "\\": "\\\\", "\b": "\\b", "\t": "\\t", "\n": "\\n", "\f": "\\f", "\r": "\\r"}
    out = []
    for ch in text:
        if ch in named:
            out.append(named[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


@dataclass(frozen=True)
class KeyInfo:
    """One documented key: dotted name, TOML type, default as TOML text, meaning."""

    key: str
    type: str
    default: str
    meaning: str


_TYPE_NAMES = {"str": "string", "int": "integer", "float": "float", "bool": "boolean", "path": "path",
               "path?": "path or \"\"", "int?": "integer or \"auto\"", "float?": "float or \"auto\"",
               "fractions": "3 floats"}


def config_keys() -> list[KeyInfo]:
    """Every config key with its type, default and meaning, in file order."""
    infos = []
    for section, cls in SECTIONS.items():
        for f in fields(cls):
            meta = f.metadata
            kind = _TYPE_NAMES[meta["kind"]]
            if meta["choices"]:
                kind += ": " + " | ".join(meta["choices"])
            default = "(required)" if meta["required"] else _toml_value(f.default, meta["kind"])
            infos.append(KeyInfo(f"{section}.{f.name}", kind, default, meta["doc"]))
    return infos


def config_reference_markdown() -> str:
    """The config reference as Markdown: one table per section (key, type, default, meaning)."""
    out = ["## Configuration reference", "",
           "Relative paths in a config file are resolved against the file's folder. "
           "Any key can be overridden with `--set section.key=value` (a TOML value).", ""]
    for section in SECTIONS:
        out += [f"### [{section}]", "", "| key | type | default | meaning |", "| --- | --- | --- | --- |"]
        for info in config_keys():
            if info.key.startswith(section + "."):
                cells = [f"`{info.key.split('.', 1)[1]}`", info.type, f"`{info.default}`", info.meaning]
                out.append("| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |")
        out.append("")
    return "\n".join(out)


__all__ = ["Config", "SECTIONS", "load_config", "parse_config", "parse_override", "with_overrides",
           "effective_config", "config_keys", "config_reference_markdown", "KeyInfo"]
