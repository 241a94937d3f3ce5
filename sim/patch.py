"""Load and validate a patch file (format version 1) into plain data.

The loader reads YAML node by node (``yaml.compose`` with the safe loader) so that
every error can name the 1-based line it comes from and the part it concerns::

    drone.yaml:12: part R3: value '-4k7' must be positive (a resistance in ohms such as 4.7k or 4k7)

It knows no particular kind of part: terminals, parameters, models and extra checks
all come from the declarations in :data:`blocks.REGISTRY`.

Values of a part are resolved in this order, later ones winning: the parameter's
default < the kind's built-in model < the patch's ``models:`` entry < the keys on the
part < overrides (``--set REF.param=value``).  A patch model may itself start from a
built-in model of its kind (``models: {dim: {base: diode, model: red-led, ...}}``).
"""

from __future__ import annotations

import difflib
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import yaml
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from blocks import REGISTRY
from blocks._base import Kind, Param
from sim.errors import PatchError
from sim.units import describe, example, format_quantity, parse_quantity

#: The patch format version this loader reads.
FORMAT_VERSION = 1

#: The supply rails, in the order (positive, negative).
RAILS = ("vdd", "gnd")

#: Reference and kind name of the supply (declared at top level, not under ``parts``).
SUPPLY = "supply"

#: Top-level keys of a patch, in the order the format describes them.
TOP_KEYS = ("format", "patch", "description", "supply", "parts", "models", "probes", "listen")

#: Keys a part may carry besides its kind's terminals and parameters.
PART_EXTRA_KEYS = ("kind", "chip", "model", "tolerance")

#: Keys a supply may carry besides its kind's parameters.
SUPPLY_EXTRA_KEYS = ("model", "tolerance")

#: Keys of a ``models:`` entry besides the base kind's parameters.
MODEL_EXTRA_KEYS = ("base", "model")

#: Largest tolerance accepted, percent (exclusive): 100 % would allow a zero value.
MAX_TOLERANCE_PCT = 100.0

#: How many close spellings a "did you mean" hint offers.
SUGGESTIONS = 1

_PATCH_NAME = re.compile(r"^[A-Za-z0-9_-][A-Za-z0-9_.-]*$")
_REF = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")

_STR_TAG = "tag:yaml.org,2002:str"
_INT_TAG = "tag:yaml.org,2002:int"
_NULL_TAG = "tag:yaml.org,2002:null"


@dataclass
class Part:
    """One part of a patch (or the supply), every value resolved to SI floats.

    ``nets`` maps each terminal key to its nets, in ``Kind.terminals`` order;
    ``values`` holds every parameter of the kind (numbers in SI units, choices and
    text as strings); ``line`` is the 1-based line of the part's key (0 when the
    part is not written in the file, as for an omitted ``supply:``); ``lines`` the
    line of each key given on the part; ``tolerance_pct`` the tolerance in percent
    of each parameter that has one.
    """

    ref: str
    kind: str
    nets: dict[str, tuple[str, ...]]
    values: dict[str, float | str]
    line: int
    lines: dict[str, int]
    chip: str | None = None
    model: str | None = None
    tolerance_pct: dict[str, float] = field(default_factory=dict)


@dataclass
class Listen:
    """What goes to the WAV: a net against gnd, a pair (plus, minus), or a part's current."""

    nets: tuple[str, ...]
    part: str | None
    line: int


@dataclass
class _Override:
    """One ``REF.param=value`` request; ``label`` is how errors name it."""

    label: str
    ref: str
    param: str
    raw: object


@dataclass
class _Source:
    """The composed file a Patch was built from (kept so variants can be rebuilt)."""

    display: str
    path: str
    base_dir: str
    root: MappingNode
    lone_nets_ok: bool = False  # leave nets with one connection to sim.checks


@dataclass
class Patch:
    """A validated patch: plain data, units resolved (see the module docstring)."""

    name: str
    path: str
    base_dir: str
    description: str
    supply: Part
    parts: dict[str, Part]
    probes: list[str]
    listen: Listen
    models: dict[str, dict]
    _source: _Source | None = field(default=None, repr=False, compare=False)
    _overrides: tuple[_Override, ...] = field(default=(), repr=False, compare=False)

    def nets(self) -> list[str]:
        """Every net named in the patch: ``vdd``, ``gnd``, then the others in file order."""
        names = list(RAILS)
        for part in self.parts.values():
            for nets in part.nets.values():
                names.extend(n for n in nets if n not in names)
        return names

    @property
    def overrides(self) -> tuple[str, ...]:
        """The overrides applied to the file, oldest first, as ``"REF.param=value"``."""
        return tuple(f"{o.ref}.{o.param}={o.raw}" for o in self._overrides)

    def variant(self, overrides: Mapping[str, object]) -> Patch:
        """A new validated Patch with ``{"REF.param": value}`` applied on top of this one.

        Values may be numbers or strings as in the patch (``{"supply.volts": "7.5"}``).
        The original Patch is left untouched. Raises PatchError naming the override.
        """
        if self._source is None:
            raise PatchError("this patch was not loaded from a file, so it has no variants")
        extra = []
        for key, raw in overrides.items():
            label = f"override {key}={raw}"
            ref, _, param = str(key).partition(".")
            if not ref or not param:
                raise PatchError(f"{label}: expected REF.param such as RV1.position",
                                 file=self._source.display)
            extra.append(_Override(label, ref.strip(), param.strip(), raw))
        return _Builder(self._source, self._overrides + tuple(extra)).build()


def parse_override(text: str) -> tuple[str, str, str]:
    """Split ``"REF.param=value"`` into ``(ref, param, raw value)``.

    Raises ValueError saying what was expected when the text has no ``=``, no
    ``.`` before it, or an empty part.
    """
    shape = "REF.param=value such as RV1.position=0.7 or supply.volts=7.5"
    left, equals, raw = text.partition("=")
    if not equals:
        raise ValueError(f"no '=' found: expected {shape}")
    ref, dot, param = left.partition(".")
    ref, param, raw = ref.strip(), param.strip(), raw.strip()
    if not dot or not ref or not param:
        raise ValueError(f"expected {shape}")
    if not raw:
        raise ValueError(f"no value after '=': expected {shape}")
    return ref, param, raw


def is_spare(part: Part) -> bool:
    """True for a tied-off spare: a part with inputs, every one of them on a rail.

    An unused gate of a package is written this way (``in: gnd``) so that its input
    does not float; its output is then left open.
    """
    kind = REGISTRY[part.kind]
    return bool(kind.inputs) and all(net in RAILS for key in kind.inputs
                                     for net in part.nets[key])


def load_patch(path: str | os.PathLike, overrides: Sequence[str] = (), *,
               lone_nets_ok: bool = False) -> Patch:
    """Read, validate and resolve the patch at ``path``.

    ``overrides`` are ``"REF.param=value"`` strings (from ``--set``), applied after
    every value in the file. Raises PatchError naming the file, line and part.
    ``lone_nets_ok`` accepts nets that only one terminal reaches (``halfrail check``
    reports them among its findings instead of stopping at the first).
    """
    display = os.fspath(path)
    requests = []
    for text in overrides:
        try:
            ref, param, raw = parse_override(text)
        except ValueError as error:
            raise PatchError(f"--set {text}: {error}", file=display) from error
        requests.append(_Override(f"--set {text}", ref, param, raw))
    source = _Source(display, os.path.abspath(display),
                     os.path.dirname(os.path.abspath(display)), _read(display), lone_nets_ok)
    return _Builder(source, tuple(requests)).build()


# ---------------------------------------------------------------------------------
# reading the file


def _line(node: Node) -> int:
    return node.start_mark.line + 1


def _read(display: str) -> MappingNode:
    """Compose the file into YAML nodes; check it is one mapping without duplicate keys."""
    try:
        with open(display, encoding="utf-8") as handle:
            text = handle.read()
    except FileNotFoundError as error:
        raise PatchError("no such file: expected a patch file such as drone.yaml",
                         file=display) from error
    except IsADirectoryError as error:
        raise PatchError("is a folder: expected a patch file such as drone.yaml",
                         file=display) from error
    except UnicodeDecodeError as error:
        raise PatchError("is not UTF-8 text: expected a YAML patch file",
                         file=display) from error
    except OSError as error:
        raise PatchError(f"cannot be read: {error.strerror}", file=display) from error
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as error:
        mark = error.problem_mark or error.context_mark
        problem = " ".join(s for s in (error.context, error.problem) if s)
        raise PatchError(f"not valid YAML: {problem} (a patch is one YAML mapping: "
                         "format: 1, patch: NAME, parts: ...)",
                         file=display, line=mark.line + 1 if mark else None) from error
    except yaml.YAMLError as error:
        raise PatchError(f"not valid YAML: {error}", file=display) from error
    if root is None:
        raise PatchError("the file is empty: expected a patch starting with 'format: 1'",
                         file=display, line=1)
    if not isinstance(root, MappingNode):
        raise PatchError("the top level must be a mapping of keys such as format: 1, "
                         "patch: NAME, parts: ...", file=display, line=_line(root))
    _reject_duplicates(root, display, (), set())
    return root


def _reject_duplicates(node: Node, display: str, path: tuple[str, ...], seen: set) -> None:
    """Raise on the first mapping that repeats a key (YAML would silently keep the last)."""
    if id(node) in seen:  # aliases may share (or even nest) nodes
        return
    seen.add(id(node))
    part = path[1] if len(path) >= 2 and path[0] == "parts" else None
    if path and path[0] == SUPPLY:
        part = SUPPLY
    if isinstance(node, MappingNode):
        first: dict[str, Node] = {}
        for key, value in node.value:
            name = key.value if isinstance(key, ScalarNode) else None
            if name is not None and name in first:
                raise PatchError(f"duplicate key '{name}' (first given on line "
                                 f"{_line(first[name])}): YAML would keep only the last; "
                                 "give each key once", file=display, line=_line(key),
                                 part=name if path == ("parts",) else part)
            if name is not None:
                first[name] = key
            _reject_duplicates(value, display, path + (name or "",), seen)
    elif isinstance(node, SequenceNode):
        for item in node.value:
            _reject_duplicates(item, display, path + ("",), seen)


def _is_null(node: Node) -> bool:
    return isinstance(node, ScalarNode) and node.tag == _NULL_TAG


def _suggest(word: str, options: Sequence[str]) -> str:
    close = difflib.get_close_matches(word, list(options), n=SUGGESTIONS)
    return f"; did you mean '{close[0]}'?" if close else ""


def _show(raw: object) -> str:
    return raw if isinstance(raw, str) else repr(raw)


# ---------------------------------------------------------------------------------
# values


def resolve_value(param: Param, raw: object) -> float | str:
    """Read ``raw`` (YAML text, a number, or an override string) as ``param``'s value.

    Returns a float in SI units, or the string for a choice or a text parameter.
    Raises ValueError with a message that starts with the parameter's name, e.g.
    ``position 1.5 is out of range: expected 0 to 1``.
    """
    name = param.name
    if raw is None or (isinstance(raw, str) and not raw.strip() and not param.text):
        raise ValueError(f"{name} is empty: expected {_expected(param)}")
    if param.text:
        if not isinstance(raw, str):
            raise ValueError(f"{name} {_show(raw)} is not text: expected a file name "
                             "such as tone.wav")
        return raw
    if param.choices is not None:
        if raw not in param.choices:
            raise ValueError(f"unknown {name} '{raw}' (choices: {', '.join(param.choices)}"
                             f"{_suggest(str(raw), param.choices)})")
        return raw
    try:
        value = parse_quantity(raw, param.unit)
    except ValueError as error:
        raise ValueError(f"{name} {error}") from error
    shown = f"'{raw}'" if isinstance(raw, str) else format_quantity(value, param.unit)
    if param.positive and value <= 0:
        raise ValueError(f"{name} {shown} must be positive ({describe(param.unit)})")
    low, high = param.minimum, param.maximum
    if (low is not None and value < low) or (high is not None and value > high):
        if low is not None and high is not None:
            bounds = (f"{format_quantity(low, param.unit)} to "
                      f"{format_quantity(high, param.unit)}")
        elif low is not None:
            bounds = f"at least {format_quantity(low, param.unit)}"
        else:
            bounds = f"at most {format_quantity(high, param.unit)}"
        raise ValueError(f"{name} {shown} is out of range: expected {bounds}")
    return value


def _expected(param: Param) -> str:
    if param.text:
        return "a file name such as tone.wav"
    if param.choices is not None:
        return f"one of {', '.join(param.choices)}"
    return describe(param.unit)


def _parse_tolerance(raw: object) -> float:
    """A tolerance in percent (``5``, ``"5%"``); raises ValueError."""
    try:
        pct = parse_quantity(raw, "%")
    except ValueError as error:
        raise ValueError(f"tolerance {error}") from error
    if not 0.0 <= pct < MAX_TOLERANCE_PCT:
        raise ValueError(f"tolerance {_show(raw)} is out of range: expected 0 % up to "
                         f"(not including) {MAX_TOLERANCE_PCT:g} %")
    return pct


def _example(kind: Kind) -> str:
    """A one-line example of a part of ``kind`` (or of the supply) for messages."""
    if kind.name == SUPPLY:
        required = [f"{p.name}: {example(p.unit)}" for p in kind.params if p.default is None]
        return "supply: {" + ", ".join(required) + "}"
    bits = [f"kind: {kind.name}"]
    for number, (key, count) in enumerate(kind.terminals):
        nets = [f"n{number * 2 + i + 1}" for i in range(count)]
        bits.append(f"{key}: {nets[0]}" if count == 1 else f"{key}: [{', '.join(nets)}]")
    for param in kind.params:
        if param.default is None:
            bits.append(f"{param.name}: {example(param.unit)}")
    return "{" + ", ".join(bits) + "}"


# ---------------------------------------------------------------------------------
# building a Patch


class _Builder:
    """Turns the composed file plus overrides into a validated Patch."""

    def __init__(self, source: _Source, overrides: tuple[_Override, ...]):
        self.source = source
        self.file = source.display
        self.overrides = overrides
        self.models: dict[str, dict] = {}
        self.model_lines: dict[str, int] = {}

    # -- errors ---------------------------------------------------------------
    def error(self, message: str, node: Node | int | None = None,
              part: str | None = None) -> PatchError:
        line = _line(node) if isinstance(node, Node) else node
        return PatchError(message, file=self.file, line=line, part=part)

    def override_error(self, override: _Override, message: str) -> PatchError:
        error = PatchError(f"{override.label}: {message}", file=self.file)
        error.part = override.ref
        return error

    # -- node helpers ---------------------------------------------------------
    def entries(self, node: Node, what: str, part: str | None = None
                ) -> dict[str, tuple[Node, Node]]:
        """Key text -> (key node, value node) of a mapping node, in file order.

        An empty value (``parts:`` with nothing after it) counts as an empty mapping.
        """
        if _is_null(node):
            return {}
        if not isinstance(node, MappingNode):
            raise self.error(what, node, part)
        result = {}
        for key, value in node.value:
            if not isinstance(key, ScalarNode):
                raise self.error("a key must be a plain name, not a list or mapping", key, part)
            result[key.value] = (key, value)
        return result

    def text(self, node: Node, what: str, part: str | None = None) -> str:
        """The text of a scalar node that must be a non-empty string."""
        if not isinstance(node, ScalarNode) or node.tag == _NULL_TAG or not node.value.strip():
            raise self.error(what, node, part)
        return node.value

    def raw(self, node: Node, param: Param, part: str | None) -> object:
        """The raw value of a parameter node: its text, or None when empty."""
        if not isinstance(node, ScalarNode):
            raise self.error(f"{param.name} must be a single value: expected "
                             f"{_expected(param)}", node, part)
        return None if node.tag == _NULL_TAG else node.value

    # -- the whole patch ------------------------------------------------------
    def build(self) -> Patch:
        top = self.entries(self.source.root, "the top level must be a mapping")
        for key, (key_node, _) in top.items():
            if key not in TOP_KEYS:
                raise self.error(f"unknown top-level key '{key}' (accepted: "
                                 f"{', '.join(TOP_KEYS)}{_suggest(key, TOP_KEYS)})", key_node)
        self.check_format(top)
        name = self.patch_name(top)
        description = ""
        if "description" in top:
            node = top["description"][1]
            if not _is_null(node):
                if not isinstance(node, ScalarNode) or node.tag != _STR_TAG:
                    raise self.error("description must be text", node)
                description = node.value
        if "models" in top:
            self.read_models(top["models"][1])
        supply = self.supply(top.get("supply"))
        parts = self.parts(top)
        known = {SUPPLY, *parts}
        for override in self.overrides:
            if override.ref not in known:
                refs = [SUPPLY, *parts]
                raise self.override_error(override, f"no part {override.ref} (parts: "
                                          f"{', '.join(refs)}{_suggest(override.ref, refs)})")
        probes = self.probes(top.get("probes"), parts)
        listen = self.listen(top, parts, probes)
        if not self.source.lone_nets_ok:
            self.check_connections(parts, set(probes) | set(listen.nets))
        return Patch(name=name, path=self.source.path, base_dir=self.source.base_dir,
                     description=description, supply=supply, parts=parts, probes=probes,
                     listen=listen, models=self.models, _source=self.source,
                     _overrides=self.overrides)

    def check_format(self, top: dict) -> None:
        if "format" not in top:
            raise self.error(f"missing 'format: {FORMAT_VERSION}' (the patch format version)",
                             self.source.root)
        node = top["format"][1]
        if not (isinstance(node, ScalarNode) and node.tag == _INT_TAG
                and node.value == str(FORMAT_VERSION)):
            found = "a collection"
            if isinstance(node, ScalarNode):
                found = f"'{node.value}' (text)" if node.tag == _STR_TAG else node.value
            raise self.error(f"format must be {FORMAT_VERSION} (this halfrail reads patch "
                             f"format version {FORMAT_VERSION}), found {found}", node)

    def patch_name(self, top: dict) -> str:
        if "patch" not in top:
            raise self.error("missing 'patch: NAME' (the name used for output files, "
                             "such as drone-1)", self.source.root)
        node = top["patch"][1]
        name = node.value if isinstance(node, ScalarNode) and node.tag != _NULL_TAG else None
        if not name or not _PATCH_NAME.match(name):
            shown = f"'{name}'" if name else "empty"
            raise self.error(f"patch name {shown} is not safe for file names: use letters, "
                             "digits, - _ and . only, not starting with '.' (such as drone-1)",
                             node)
        return name

    # -- models -----------------------------------------------------------------
    def read_models(self, node: Node) -> None:
        expected = "models must be a mapping of name -> {base: KIND, params...}"
        for name, (key_node, body) in self.entries(node, expected).items():
            what = f"model {name}"
            fields = self.entries(body, f"{what} must be a mapping such as "
                                        "{base: inverter, gain: 12}")
            if "base" not in fields:
                raise self.error(f"{what}: missing 'base: KIND' (kinds: "
                                 f"{', '.join(self.part_kinds())})", key_node)
            base = self.kind_of(fields["base"][1], f"{what}: base: ", None, allow_supply=True)
            kind = REGISTRY[base]
            if name in kind.models:
                raise self.error(f"{what}: '{name}' is already a built-in model of {base}; "
                                 "choose another name", key_node)
            parsed: dict[str, object] = {"base": base}
            accepted = [*MODEL_EXTRA_KEYS, *kind.param_names]
            for key, (field_key, field_node) in fields.items():
                if key == "base":
                    continue
                if key == "model":
                    builtin = self.text(field_node, f"{what}: model must be a name", None)
                    if builtin not in kind.models:
                        raise self.error(f"{what}: unknown built-in model '{builtin}' of "
                                         f"{base} (models: {', '.join(kind.models) or 'none'})",
                                         field_node)
                    parsed["model"] = builtin
                    continue
                if key not in kind.param_names:
                    raise self.error(f"{what}: unknown parameter '{key}' for {base} (accepted: "
                                     f"{', '.join(accepted)}{_suggest(key, accepted)})",
                                     field_key)
                param = kind.param(key)
                try:
                    parsed[key] = resolve_value(param, self.raw(field_node, param, None))
                except ValueError as error:
                    raise self.error(f"{what}: {error}", field_node) from error
            self.models[name] = parsed
            self.model_lines[name] = _line(key_node)

    # -- kinds ------------------------------------------------------------------
    @staticmethod
    def part_kinds() -> list[str]:
        return sorted(k for k in REGISTRY if k != SUPPLY)

    def kind_of(self, node: Node, prefix: str, part: str | None, allow_supply: bool = False
                ) -> str:
        """The kind named by ``node``; ``prefix`` starts each message (may be empty)."""
        kinds = self.part_kinds()
        name = self.text(node, f"{prefix}kind must be a name (kinds: {', '.join(kinds)})", part)
        if name == SUPPLY and not allow_supply:
            raise self.error(f"{prefix}the supply is not a part: give it at the top level "
                             "as supply: {volts: 9}", node, part)
        if name not in REGISTRY:
            raise self.error(f"{prefix}unknown kind '{name}' (kinds: {', '.join(kinds)}"
                             f"{_suggest(name, kinds)})", node, part)
        return name

    # -- the supply and the parts ---------------------------------------------
    def supply(self, item: tuple[Node, Node] | None) -> Part:
        kind = REGISTRY[SUPPLY]
        if item is None:
            return self.resolve(SUPPLY, kind, {}, 0, {"rails": RAILS}, 1)
        key_node, node = item
        if isinstance(node, ScalarNode) and node.tag != _NULL_TAG and kind.main_param:
            fields = {kind.main_param: (key_node, node)}
        else:
            fields = self.entries(node, "supply must be a mapping such as {volts: 9, "
                                        "source_ohms: 2}", SUPPLY)
        accepted = [*kind.param_names, *SUPPLY_EXTRA_KEYS]
        for key, (field_key, _) in fields.items():
            if key not in accepted:
                raise self.error(f"unknown key '{key}' for the supply (accepted: "
                                 f"{', '.join(accepted)}{_suggest(key, accepted)})",
                                 field_key, SUPPLY)
        return self.resolve(SUPPLY, kind, fields, _line(key_node), {"rails": RAILS},
                            _line(key_node))

    def parts(self, top: dict) -> dict[str, Part]:
        if "parts" not in top:
            raise self.error("missing 'parts:' (a mapping of reference -> part, such as "
                             "R1: {kind: resistor, between: [n1, n2], value: 4k7})",
                             self.source.root)
        node = top["parts"][1]
        mapping = self.entries(node, "parts must be a mapping of reference -> part, such as "
                                     "R1: {kind: resistor, between: [n1, n2], value: 4k7}")
        if not mapping:
            raise self.error("parts is empty: a patch needs at least one part", node)
        return {ref: self.part(ref, key, body) for ref, (key, body) in mapping.items()}

    def part(self, ref: str, key_node: Node, node: Node) -> Part:
        if ref == SUPPLY:
            raise self.error("'supply' is not a part reference: give the supply at the top "
                             "level as supply: {volts: 9}", key_node)
        if not _REF.match(ref):
            raise self.error(f"reference '{ref}' must start with a letter and use only letters, "
                             "digits and _ (such as R1, U1A, RV2)", key_node)
        fields = self.entries(node, "a part must be a mapping such as {kind: resistor, "
                                    "between: [n1, n2], value: 4k7}", ref)
        if "kind" not in fields:
            raise self.error(f"missing 'kind' (kinds: {', '.join(self.part_kinds())})",
                             key_node, ref)
        kind = REGISTRY[self.kind_of(fields["kind"][1], "", ref)]
        terminals = [key for key, _ in kind.terminals]
        accepted = ["kind", *terminals, *kind.param_names,
                    *(k for k in PART_EXTRA_KEYS if k != "kind")]
        for key, (field_key, _) in fields.items():
            if key not in accepted:
                raise self.error(f"unknown key '{key}' for a {kind.name} (accepted: "
                                 f"{', '.join(accepted)}{_suggest(key, accepted)})",
                                 field_key, ref)
        nets = {}
        for key, count in kind.terminals:
            if key not in fields:
                raise self.error(f"missing terminal '{key}' (a {kind.name} is written "
                                 f"{_example(kind)})", key_node, ref)
            nets[key] = self.terminal(fields[key][1], key, count, ref)
        chip = None
        if "chip" in fields:
            chip = self.text(fields["chip"][1], "chip must be a name such as U1", ref)
        params = {k: v for k, v in fields.items() if k not in terminals and k != "chip"
                  and k != "kind"}
        return self.resolve(ref, kind, params, _line(key_node), nets, _line(key_node),
                            chip=chip, lines={k: _line(kn) for k, (kn, _) in fields.items()})

    def terminal(self, node: Node, key: str, count: int, ref: str) -> tuple[str, ...]:
        if count == 1:
            if isinstance(node, SequenceNode):
                raise self.error(f"{key} takes one net such as {key}: n1, not a list",
                                 node, ref)
            return (self.net(node, ref),)
        shape = f"{key}: [{', '.join(f'n{i + 1}' for i in range(count))}]"
        if not isinstance(node, SequenceNode):
            raise self.error(f"{key} takes {count} nets as a list such as {shape}", node, ref)
        if len(node.value) != count:
            raise self.error(f"{key} takes {count} nets such as {shape}, "
                             f"found {len(node.value)}", node, ref)
        return tuple(self.net(item, ref) for item in node.value)

    def net(self, node: Node, ref: str | None) -> str:
        """A net name: text without spaces; the rails spelled in lower case."""
        if not isinstance(node, ScalarNode):
            raise self.error("a net must be a name such as n1, not a list or mapping",
                             node, ref)
        name = node.value
        if node.tag != _STR_TAG:
            raise self.error(f"net {name or 'null'} is not a name: nets are text such as n1 "
                             f"(to use it as written, quote it: '{name}')", node, ref)
        if not name or any(c.isspace() for c in name):
            raise self.error(f"net '{name}' must be a name without spaces such as n1",
                             node, ref)
        if name.lower() in RAILS and name not in RAILS:
            raise self.error(f"net '{name}': the rails are written in lower case "
                             f"({', '.join(RAILS)})", node, ref)
        return name

    # -- values -----------------------------------------------------------------
    def resolve(self, ref: str, kind: Kind, fields: dict[str, tuple[Node, Node]],
                line: int, nets: dict, error_line: int, *, chip: str | None = None,
                lines: dict[str, int] | None = None) -> Part:
        """Resolve every parameter of one part (see the module docstring for the order)."""
        overrides = [o for o in self.overrides if o.ref == ref]
        settable = [*kind.param_names, "model", "tolerance"]
        for override in overrides:
            if override.param not in settable:
                if override.param in {key for key, _ in kind.terminals} | {"kind", "chip"}:
                    raise self.override_error(override, f"{override.param} cannot be "
                                              "changed by an override; edit the patch")
                raise self.override_error(override, f"{ref} ({kind.name}) has no parameter "
                                          f"'{override.param}' (parameters: "
                                          f"{', '.join(settable)}"
                                          f"{_suggest(override.param, settable)})")
        values: dict[str, float | str | None] = {p.name: p.default for p in kind.params}
        model, model_node = self.model_name(ref, fields, overrides)
        if model is not None:
            self.apply_model(ref, kind, model, model_node, values)
        for key, (_, node) in fields.items():
            if key in kind.param_names:
                param = kind.param(key)
                try:
                    values[key] = resolve_value(param, self.raw(node, param, ref))
                except ValueError as error:
                    raise self.error(str(error), node, ref) from error
        for override in overrides:
            if override.param in kind.param_names:
                try:
                    values[override.param] = resolve_value(kind.param(override.param),
                                                           override.raw)
                except ValueError as error:
                    raise self.override_error(override, str(error)) from error
        for param in kind.params:
            if values[param.name] is None:
                raise self.error(f"missing value '{param.name}' ({_expected(param)}; a "
                                 f"{kind.name} is written {_example(kind)})",
                                 error_line, ref)
        if kind.resolve is not None:
            given = ({key for key in fields if key in kind.param_names}
                     | {o.param for o in overrides}
                     | {p.name for p in kind.params if values[p.name] != p.default})
            values = kind.resolve(values, given)
        self.check_files(ref, kind, values, fields, overrides)
        tolerance = self.tolerance(ref, kind, fields.get("tolerance"), overrides)
        messages = kind.check(values) if kind.check else []
        if messages:
            labels = ", ".join(o.label for o in overrides)
            suffix = f" (with {labels})" if labels else ""
            raise self.error("; ".join(messages) + suffix, error_line or None, ref)
        return Part(ref=ref, kind=kind.name, nets=nets, values=values, line=line,
                    lines=lines if lines is not None else
                    {k: _line(kn) for k, (kn, _) in fields.items()},
                    chip=chip, model=model, tolerance_pct=tolerance)

    def model_name(self, ref: str, fields: dict, overrides: list[_Override]
                   ) -> tuple[str | None, Node | _Override | None]:
        chosen = None
        where: Node | _Override | None = None
        if "model" in fields:
            where = fields["model"][1]
            chosen = self.text(where, "model must be a name (a built-in model of the kind "
                                      "or one under models:)", ref)
        for override in overrides:
            if override.param == "model":
                chosen, where = str(override.raw), override
        return chosen, where

    def apply_model(self, ref: str, kind: Kind, name: str, where: Node | _Override,
                    values: dict) -> None:
        """Set ``values`` from model ``name``: its built-in base, then its own entries."""
        def fail(message: str) -> PatchError:
            if isinstance(where, _Override):
                return self.override_error(where, message)
            return self.error(message, where, ref)

        builtin, own = name, {}
        if name in self.models:
            own = self.models[name]
            if own["base"] != kind.name:
                raise fail(f"model {name} (line {self.model_lines[name]}) is for "
                           f"{own['base']}, not {kind.name}")
            builtin = own.get("model")
        elif name not in kind.models:
            mine = [m for m, body in self.models.items() if body["base"] == kind.name]
            options = [*kind.models, *mine]
            known = (f"models: {', '.join(options)}{_suggest(name, options)}" if options else
                     f"a {kind.name} has no built-in models; define one under models: with "
                     f"base: {kind.name}")
            raise fail(f"unknown model '{name}' for {kind.name} ({known})")
        if builtin is not None:
            for key, raw in kind.models[builtin].items():
                try:
                    values[key] = resolve_value(kind.param(key), raw)
                except (KeyError, ValueError) as error:
                    raise fail(f"built-in model {builtin} of {kind.name} is broken: "
                               f"{key}: {error}") from error
        values.update({k: v for k, v in own.items() if k not in MODEL_EXTRA_KEYS})

    def check_files(self, ref: str, kind: Kind, values: dict, fields: dict,
                    overrides: list[_Override]) -> None:
        """Text parameters name files relative to the patch's folder: they must exist."""
        for param in kind.params:
            name = values[param.name]
            if not param.text or not name:
                continue
            if os.path.isfile(os.path.join(self.source.base_dir, name)):
                continue
            message = (f"{param.name}: no file '{name}' (a file name is read relative to "
                       f"the patch's folder {self.source.base_dir})")
            last = [o for o in overrides if o.param == param.name]
            if last:
                raise self.override_error(last[-1], message)
            node = fields[param.name][1] if param.name in fields else None
            raise self.error(message, node, ref)

    def tolerance(self, ref: str, kind: Kind, item: tuple[Node, Node] | None,
                  overrides: list[_Override]) -> dict[str, float]:
        """Tolerance in percent per parameter: declared defaults, then the part's ``tolerance``."""
        result = {p.name: p.tolerance_pct for p in kind.params if p.tolerance_pct is not None}
        numeric = [p.name for p in kind.params if not p.text and p.choices is None]
        no_main = (f"a {kind.name} has no main value: give tolerance as a mapping such as "
                   f"tolerance: {{{numeric[0] if numeric else 'param'}: 5%}}")
        if item is not None:
            _, node = item
            if isinstance(node, MappingNode):
                for key, (key_node, pct_node) in self.entries(node, "", ref).items():
                    if key not in numeric:
                        raise self.error(f"tolerance: '{key}' is not a numeric parameter of "
                                         f"{kind.name} (parameters: {', '.join(numeric)}"
                                         f"{_suggest(key, numeric)})", key_node, ref)
                    result[key] = self.percent(pct_node, ref)
            elif kind.main_param is None:
                raise self.error(f"tolerance: {no_main}", node, ref)
            else:
                result[kind.main_param] = self.percent(node, ref)
        for override in overrides:
            if override.param == "tolerance":
                if kind.main_param is None:
                    raise self.override_error(override, no_main)
                try:
                    result[kind.main_param] = _parse_tolerance(override.raw)
                except ValueError as error:
                    raise self.override_error(override, str(error)) from error
        return result

    def percent(self, node: Node, ref: str) -> float:
        if not isinstance(node, ScalarNode) or node.tag == _NULL_TAG:
            raise self.error("tolerance must be a percentage such as 5% or a mapping such as "
                             "{value: 5%}", node, ref)
        try:
            return _parse_tolerance(node.value)
        except ValueError as error:
            raise self.error(str(error), node, ref) from error

    # -- nets, probes, listen -----------------------------------------------------
    def check_connections(self, parts: dict[str, Part], named: set[str]) -> None:
        """Each net other than the rails must reach two terminals (or be probed/listened).

        A spare part's outputs may stay open (see :func:`is_spare`).
        """
        uses: dict[str, list[tuple[Part, str]]] = {}
        for part in parts.values():
            for key, nets in part.nets.items():
                for net in nets:
                    uses.setdefault(net, []).append((part, key))
        for net, where in uses.items():
            if net in RAILS or net in named or len(where) > 1:
                continue
            part, key = where[0]
            if is_spare(part) and key in REGISTRY[part.kind].outputs:
                continue
            raise self.error(f"net {net} connects only to {part.ref}.{key} — a typo? (a net "
                             "needs a second connection, or to be probed or listened to)",
                             part.lines.get(key, part.line), part.ref)

    def known_net(self, node: Node, what: str, parts: dict[str, Part]) -> str:
        name = self.net(node, None)
        nets = {n for p in parts.values() for ns in p.nets.values() for n in ns} | set(RAILS)
        if name not in nets:
            raise self.error(f"{what} '{name}' is not a net of this patch (nets: "
                             f"{', '.join(sorted(nets))}{_suggest(name, sorted(nets))})", node)
        return name

    def probes(self, item: tuple[Node, Node] | None, parts: dict[str, Part]) -> list[str]:
        if item is None:
            return []
        _, node = item
        if _is_null(node):
            return []
        items = [node] if isinstance(node, ScalarNode) else None
        if isinstance(node, SequenceNode):
            items = node.value
        if items is None:
            raise self.error("probes must be a list of nets such as [n1, n2]", node)
        probes: list[str] = []
        for probe in items:
            name = self.known_net(probe, "probe", parts)
            if name in probes:
                raise self.error(f"probe '{name}' is listed twice", probe)
            probes.append(name)
        return probes

    def listen(self, top: dict, parts: dict[str, Part], probes: list[str]) -> Listen:
        """What to listen to; an absent or empty ``listen:`` means the first probe."""
        if "listen" not in top or _is_null(top["listen"][1]):
            if not probes:
                raise self.error("nothing to listen to: give listen: NET (or [plus, minus]) "
                                 "or at least one probe", self.source.root)
            first = top["probes"][1]
            item = first.value[0] if isinstance(first, SequenceNode) else first
            return Listen(nets=(probes[0],), part=None, line=_line(item))
        _, node = top["listen"]
        expected = "listen takes one net, [plus, minus], or a part reference such as SP1"
        if isinstance(node, SequenceNode):
            if not 1 <= len(node.value) <= 2:
                raise self.error(f"{expected}; found a list of {len(node.value)}", node)
            nets = tuple(self.known_net(n, "listen", parts) for n in node.value)
            if len(nets) == 2 and nets[0] == nets[1]:
                raise self.error(f"listen: plus and minus are both '{nets[0]}', which is "
                                 "silent; give two different nets", node)
            return Listen(nets=nets, part=None, line=_line(node))
        if not isinstance(node, ScalarNode):
            raise self.error(expected, node)
        ref = node.value
        nets = {n for p in parts.values() for ns in p.nets.values() for n in ns}
        if ref in parts and ref not in nets and ref not in RAILS:
            kind = REGISTRY[parts[ref].kind]
            if not kind.branches:
                raise self.error(f"listen: part {ref} is a {kind.name}, which has no current "
                                 "of its own to listen to; listen to a net or [plus, minus]",
                                 node, ref)
            return Listen(nets=(), part=ref, line=_line(node))
        return Listen(nets=(self.known_net(node, "listen", parts),), part=None,
                      line=_line(node))
