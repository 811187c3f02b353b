"""Release policies: strict TOML read with the standard library into frozen dataclasses.

A policy states the privacy unit, the total epsilon of one release, how people
are grouped into supernodes, which components are released with which share of
the budget, the lifetime ledger and the utility gate. Parsing is strict: an
unknown key, a wrong type or a value out of range raises :class:`PolicyError`
naming the key (and suggesting the closest known key).

``parse_policy`` works on a mapping (already decoded TOML); ``read_policy``
opens a file. Relative paths inside a policy are resolved against the policy
file's folder.
"""

from __future__ import annotations

__all__ = [
    "ReleasePolicy",
    "PrivacyPolicy",
    "GroupingPolicy",
    "ComponentPolicy",
    "ComponentsPolicy",
    "LedgerPolicy",
    "GatePolicy",
    "InputPolicy",
    "read_policy",
    "parse_policy",
    "policy_to_dict",
    "PRIVACY_UNITS",
    "GROUPING_METHODS",
]

import dataclasses
import math
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from .errors import InputError, PolicyError, closest_name

PRIVACY_UNITS = ("edge", "person")
GROUPING_METHODS = ("attributes", "structure", "attributes+structure", "given", "random")
EPSILON_WARN_ABOVE = 10.0


# --------------------------------------------------------------------------- dataclasses


@dataclass(frozen=True)
class PrivacyPolicy:
    """``[privacy]``: the neighbouring relation and the total epsilon of one release."""

    unit: str = "edge"
    epsilon: float = 1.0
    max_contacts: int | None = None


@dataclass(frozen=True)
class GroupingPolicy:
    """``[grouping]``: how people become supernodes of at least ``min_size`` members.

    ``hierarchies`` maps an attribute to its generalisation levels; each level is
    a mapping from a value to its coarser value. ``merge_order`` lists the
    attributes in the order their hierarchies are climbed (default: the reverse
    of ``attributes``, so the last attribute is generalised first).
    """

    method: str = "attributes"
    attributes: tuple[str, ...] = ()
    min_size: int = 20
    hierarchies: Mapping[str, tuple[Mapping[str, str], ...]] = field(default_factory=dict)
    merge_order: tuple[str, ...] = ()
    epsilon_share: float = 0.0  # share of the release epsilon spent on a private grouping
    tiers: int = 8  # structure grouping: number of degree tiers
    rounds: int = 0  # structure grouping: profile refinement rounds
    map_path: Path | None = None  # method "given": CSV/Parquet with node, supernode
    seed_note: str = ""


@dataclass(frozen=True)
class ComponentPolicy:
    """One released component: switch, share of epsilon and its own options."""

    name: str
    enabled: bool
    share: float | None = None
    max_degree: int | None = None  # degree histograms: public cap (top bin = cap or more)
    column: str | None = None  # weight totals: the edge weight column
    clip: int | None = None  # weight totals: weights clipped to [0, clip]
    method: str = "auto"  # superedge counts: dense, sparse or auto
    sparse_threshold: float | None = None  # sparse release: noisy cells below are dropped
    sparse_above_cells: int = 10_000_000  # auto switches to sparse from this many cells


@dataclass(frozen=True)
class ComponentsPolicy:
    """``[components]``: which components are released."""

    supernode_sizes: ComponentPolicy
    superedge_counts: ComponentPolicy
    degree_histograms: ComponentPolicy
    weight_totals: ComponentPolicy

    def all(self) -> tuple[ComponentPolicy, ...]:
        return (self.supernode_sizes, self.superedge_counts, self.degree_histograms, self.weight_totals)


@dataclass(frozen=True)
class LedgerPolicy:
    """``[ledger]``: the persistent lifetime budget of one dataset."""

    path: Path
    dataset: str
    lifetime_epsilon: float


@dataclass(frozen=True)
class GatePolicy:
    """``[gate]``: utility thresholds a release must meet before it is published.

    ``None`` means the threshold is not checked.
    """

    max_degree_ks: float | None = None
    max_degree_wasserstein: float | None = None
    max_contact_matrix_median_relative_error: float | None = None
    max_superedge_median_relative_error: float | None = None
    contact_matrix_attribute: str | None = None  # default: first grouping attribute


@dataclass(frozen=True)
class InputPolicy:
    """``[input]``: column names of the input files (command-line options override)."""

    source: str = "source"
    target: str = "target"
    node: str = "node"
    weight: str | None = None
    drop_unknown: bool = False


@dataclass(frozen=True)
class ReleasePolicy:
    """A whole release policy."""

    privacy: PrivacyPolicy
    grouping: GroupingPolicy
    components: ComponentsPolicy
    ledger: LedgerPolicy | None = None
    gate: GatePolicy = field(default_factory=GatePolicy)
    input: InputPolicy = field(default_factory=InputPolicy)
    title: str = ""
    source_path: Path | None = None

    def replace(self, **changes) -> "ReleasePolicy":
        """A copy with some top-level sections replaced."""
        return dataclasses.replace(self, **changes)


# --------------------------------------------------------------------------- reading


def read_policy(path) -> ReleasePolicy:
    """Read a release policy from a TOML file.

    Parameters
    ----------
    path : str or Path
        The policy file.

    Raises
    ------
    InputError
        The file is missing or unreadable.
    PolicyError
        The TOML is invalid or the policy breaks a rule; the message names the key.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise InputError(f"{path}: policy file not found") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read policy file ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise PolicyError(f"{path}: policy is not UTF-8 text (byte {exc.start})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PolicyError(f"{path}: TOML syntax error: {exc}") from None
    try:
        return parse_policy(data, base_dir=path.parent, source_path=path)
    except PolicyError as exc:  # name the file too: one line with the file and the key
        raise PolicyError(f"{path}: {exc}") from None


def parse_policy(data: Mapping[str, Any], base_dir=None, source_path=None) -> ReleasePolicy:
    """Build a :class:`ReleasePolicy` from decoded TOML (inputs validated here)."""
    base_dir = Path(base_dir) if base_dir is not None else Path.cwd()
    top = _Section(data, "")
    top.check_keys({"title", "privacy", "grouping", "components", "ledger", "gate", "input"})
    title = top.get("title", str, "")
    privacy = _parse_privacy(top.section("privacy", required=True))
    grouping = _parse_grouping(top.section("grouping", required=True), base_dir)
    components = _parse_components(top.section("components"), privacy)
    ledger_sec = top.section("ledger")
    ledger = _parse_ledger(ledger_sec, base_dir) if ledger_sec is not None else None
    gate = _parse_gate(top.section("gate"))
    input_policy = _parse_input(top.section("input"))
    policy = ReleasePolicy(
        privacy=privacy,
        grouping=grouping,
        components=components,
        ledger=ledger,
        gate=gate,
        input=input_policy,
        title=title,
        source_path=Path(source_path) if source_path is not None else None,
    )
    _check_cross_rules(policy)
    return policy


class _Section:
    """A TOML table with strict, key-naming accessors."""

    def __init__(self, data, prefix):
        if not isinstance(data, Mapping):
            raise PolicyError(f"{prefix or 'policy'}: expected a table, got {_typename(data)}")
        self.data = data
        self.prefix = prefix

    def key(self, name):
        return f"{self.prefix}.{name}" if self.prefix else name

    def check_keys(self, known):
        for k in self.data:
            if k not in known:
                raise PolicyError(f"unknown key '{self.key(k)}'{closest_name(k, known)}")

    def section(self, name, required=False):
        if name not in self.data:
            if required:
                raise PolicyError(f"missing section [{self.key(name)}]")
            return None
        return _Section(self.data[name], self.key(name))

    def get(self, name, kind, default=..., check=None, hint=""):
        if name not in self.data:
            if default is ...:
                raise PolicyError(f"missing key '{self.key(name)}'{hint}")
            return default
        value = self.data[name]
        value = _coerce(value, kind, self.key(name))
        if check is not None:
            message = check(value)
            if message:
                raise PolicyError(f"'{self.key(name)}' {message}, got {value!r}")
        return value


def _typename(value):
    return {str: "a string", bool: "a boolean", int: "an integer", float: "a number",
            list: "a list", dict: "a table"}.get(type(value), type(value).__name__)


def _coerce(value, kind, key):
    if kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise PolicyError(f"'{key}' must be a number, got {_typename(value)} {value!r}")
        return float(value)
    if kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise PolicyError(f"'{key}' must be an integer, got {_typename(value)} {value!r}")
        return value
    if kind is bool:
        if not isinstance(value, bool):
            raise PolicyError(f"'{key}' must be true or false, got {_typename(value)} {value!r}")
        return value
    if kind is str:
        if not isinstance(value, str):
            raise PolicyError(f"'{key}' must be a string, got {_typename(value)} {value!r}")
        return value
    if kind == "strlist":
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise PolicyError(f"'{key}' must be a list of strings, got {_typename(value)} {value!r}")
        return tuple(value)
    raise AssertionError(kind)


def _positive_finite(v):
    if not math.isfinite(v) or v <= 0:
        return "must be a finite number > 0"
    return None


def _share(v):
    if not math.isfinite(v) or not 0 < v <= 1:
        return "must be a number in (0, 1]"
    return None


def _at_least(n):
    return lambda v: None if v >= n else f"must be >= {n}"


def _one_of(options):
    return lambda v: None if v in options else "must be one of " + ", ".join(repr(o) for o in options)


def _parse_privacy(sec: _Section) -> PrivacyPolicy:
    sec.check_keys({"unit", "epsilon", "max_contacts"})
    unit = sec.get("unit", str, "edge", check=_one_of(PRIVACY_UNITS))
    epsilon = sec.get("epsilon", float, check=_positive_finite)
    if epsilon > EPSILON_WARN_ABOVE:
        warnings.warn(
            f"privacy.epsilon = {epsilon:g} is above {EPSILON_WARN_ABOVE:g}: the guarantee is weak",
            stacklevel=2,
        )
    max_contacts = sec.get("max_contacts", int, None, check=_at_least(1))
    if unit == "person" and max_contacts is None:
        raise PolicyError(
            "missing key 'privacy.max_contacts': unit 'person' needs the promised cap on contacts per person"
        )
    if unit == "edge" and max_contacts is not None:
        raise PolicyError("'privacy.max_contacts' only applies to unit 'person'")
    return PrivacyPolicy(unit=unit, epsilon=epsilon, max_contacts=max_contacts)


def _parse_grouping(sec: _Section, base_dir: Path) -> GroupingPolicy:
    sec.check_keys({"method", "attributes", "min_size", "hierarchies", "merge_order",
                    "epsilon_share", "tiers", "rounds", "map"})
    method = sec.get("method", str, "attributes", check=_one_of(GROUPING_METHODS))
    needs_attrs = method in ("attributes", "attributes+structure")
    attributes = sec.get("attributes", "strlist", () if not needs_attrs else ...)
    if needs_attrs and not attributes:
        raise PolicyError(f"'grouping.attributes' must name at least one attribute for method '{method}'")
    if len(set(attributes)) != len(attributes):
        raise PolicyError("'grouping.attributes' lists an attribute twice")
    min_size = sec.get("min_size", int, check=_at_least(1))
    hier_sec = sec.section("hierarchies")
    hierarchies = {}
    if hier_sec is not None:
        hier_sec.check_keys(set(attributes))
        for attr, spec in hier_sec.data.items():
            hierarchies[attr] = _parse_hierarchy(_Section(spec, hier_sec.key(attr)))
    merge_order = sec.get("merge_order", "strlist", ())
    for a in merge_order:
        if a not in attributes:
            raise PolicyError(f"'grouping.merge_order' names '{a}', which is not in grouping.attributes"
                              f"{closest_name(a, attributes)}")
    if len(set(merge_order)) != len(merge_order):
        raise PolicyError("'grouping.merge_order' lists an attribute twice")
    if not merge_order:
        merge_order = tuple(reversed(attributes))
    else:
        merge_order = tuple(merge_order) + tuple(a for a in reversed(attributes) if a not in merge_order)
    private_method = method in ("structure", "attributes+structure")
    epsilon_share = sec.get("epsilon_share", float, 0.3 if private_method else 0.0)
    if private_method and not (0 < epsilon_share < 1):
        raise PolicyError(f"'grouping.epsilon_share' must be in (0, 1) for method '{method}', got {epsilon_share!r}")
    if not private_method and epsilon_share != 0.0:
        raise PolicyError(f"'grouping.epsilon_share' only applies to private grouping methods, not '{method}'")
    tiers = sec.get("tiers", int, 8, check=_at_least(1))
    rounds = sec.get("rounds", int, 0, check=_at_least(0))
    map_value = sec.get("map", str, None)
    if method == "given" and map_value is None:
        raise PolicyError("missing key 'grouping.map': method 'given' needs the public person -> supernode map")
    map_path = (base_dir / map_value) if map_value else None
    return GroupingPolicy(method=method, attributes=tuple(attributes), min_size=min_size,
                          hierarchies=hierarchies, merge_order=merge_order, epsilon_share=epsilon_share,
                          tiers=tiers, rounds=rounds, map_path=map_path)


def _parse_hierarchy(sec: _Section):
    """``levels = [ {fine = coarse, ...}, {coarse = coarser, ...} ]``."""
    sec.check_keys({"levels"})
    levels = sec.data.get("levels")
    if not isinstance(levels, list) or not levels:
        raise PolicyError(f"'{sec.key('levels')}' must be a non-empty list of tables value -> coarser value")
    out = []
    for i, level in enumerate(levels):
        key = f"{sec.key('levels')}[{i}]"
        if not isinstance(level, Mapping) or not level:
            raise PolicyError(f"'{key}' must be a non-empty table value -> coarser value")
        for k, v in level.items():
            if not isinstance(v, str):
                raise PolicyError(f"'{key}.{k}' must map to a string, got {_typename(v)}")
        out.append(dict(level))
    for i in range(1, len(out)):
        missing = set(out[i - 1].values()) - set(out[i])
        if missing:
            raise PolicyError(f"'{sec.key('levels')}[{i}]' does not cover {len(missing)} value(s) "
                              f"of level {i - 1}: {sorted(missing)[:5]}")
    return tuple(out)


_COMPONENT_KEYS = {
    "supernode_sizes": {"enabled", "share"},
    "superedge_counts": {"enabled", "share", "method", "sparse_threshold", "sparse_above_cells"},
    "degree_histograms": {"enabled", "share", "max_degree"},
    "weight_totals": {"enabled", "share", "column", "clip"},
}


def _parse_components(sec: _Section | None, privacy: PrivacyPolicy) -> ComponentsPolicy:
    data = sec if sec is not None else _Section({}, "components")
    data.check_keys(set(_COMPONENT_KEYS))
    parsed = {}
    for name, keys in _COMPONENT_KEYS.items():
        sub = data.section(name) or _Section({}, data.key(name))
        sub.check_keys(keys)
        default_on = name == "superedge_counts" or (name == "supernode_sizes")
        enabled = sub.get("enabled", bool, default_on)
        share = sub.get("share", float, None, check=_share)
        kwargs = {}
        if name == "degree_histograms":
            kwargs["max_degree"] = sub.get("max_degree", int, 50, check=_at_least(1))
        if name == "weight_totals":
            kwargs["column"] = sub.get("column", str, None)
            kwargs["clip"] = sub.get("clip", int, None, check=_at_least(1))
            if enabled and (kwargs["column"] is None or kwargs["clip"] is None):
                raise PolicyError(f"'{sub.key('column')}' and '{sub.key('clip')}' are required "
                                  "when weight totals are enabled")
        if name == "superedge_counts":
            kwargs["method"] = sub.get("method", str, "auto", check=_one_of(("auto", "dense", "sparse")))
            kwargs["sparse_threshold"] = sub.get("sparse_threshold", float, None, check=_positive_finite)
            kwargs["sparse_above_cells"] = sub.get("sparse_above_cells", int, 10_000_000, check=_at_least(1))
        parsed[name] = ComponentPolicy(name=name, enabled=enabled, share=share, **kwargs)
    if not parsed["superedge_counts"].enabled and not parsed["degree_histograms"].enabled \
            and not parsed["weight_totals"].enabled:
        raise PolicyError("'components': at least one of superedge_counts, degree_histograms, "
                          "weight_totals must be enabled")
    return ComponentsPolicy(**parsed)


def _parse_ledger(sec: _Section, base_dir: Path) -> LedgerPolicy:
    sec.check_keys({"path", "dataset", "lifetime_epsilon"})
    path = sec.get("path", str)
    dataset = sec.get("dataset", str, check=lambda v: None if v.strip() else "must not be empty")
    lifetime = sec.get("lifetime_epsilon", float, check=_positive_finite)
    return LedgerPolicy(path=(base_dir / path), dataset=dataset, lifetime_epsilon=lifetime)


def _parse_gate(sec: _Section | None) -> GatePolicy:
    if sec is None:
        return GatePolicy()
    keys = {f.name for f in dataclasses.fields(GatePolicy)}
    sec.check_keys(keys)
    values = {}
    for f in dataclasses.fields(GatePolicy):
        if f.name == "contact_matrix_attribute":
            values[f.name] = sec.get(f.name, str, None)
        else:
            values[f.name] = sec.get(f.name, float, None,
                                     check=lambda v: None if math.isfinite(v) and v >= 0 else
                                     "must be a finite number >= 0")
    return GatePolicy(**values)


def _parse_input(sec: _Section | None) -> InputPolicy:
    if sec is None:
        return InputPolicy()
    sec.check_keys({"source", "target", "node", "weight", "drop_unknown"})
    return InputPolicy(
        source=sec.get("source", str, "source"),
        target=sec.get("target", str, "target"),
        node=sec.get("node", str, "node"),
        weight=sec.get("weight", str, None),
        drop_unknown=sec.get("drop_unknown", bool, False),
    )


def _check_cross_rules(policy: ReleasePolicy) -> None:
    comps = policy.components
    if policy.privacy.unit == "edge" and comps.supernode_sizes.share is not None:
        # public grouping: sensitivity 0; private grouping: the sizes are post-processing of its noisy
        # output (already charged as 'grouping'). Either way a share here would be silently unused.
        raise PolicyError("'components.supernode_sizes.share': under unit 'edge' the sizes are released "
                          "exactly (public grouping, or post-processing of a private one); remove the share")
    for c in comps.all():
        if c.share is not None and not c.enabled:
            raise PolicyError(f"'components.{c.name}.share' is set but the component is not enabled; "
                              "its share would go unused")
    if policy.privacy.unit == "person" and not comps.supernode_sizes.enabled:
        raise PolicyError("'components.supernode_sizes.enabled' must be true under unit 'person': "
                          "the noisy sizes are needed to bound the superedge counts")
    shares = [c.share for c in budgeted_components(policy) if c.share is not None]
    if shares and len(shares) == len(budgeted_components(policy)):
        total = sum(shares) + policy.grouping.epsilon_share
        if abs(total - 1.0) > 1e-9:
            raise PolicyError(f"'components.*.share' and 'grouping.epsilon_share' must add up to 1, "
                              f"got {total:g}")
    elif shares and sum(shares) + policy.grouping.epsilon_share >= 1.0:
        raise PolicyError("'components.*.share': the explicit shares leave nothing for the other components")
    if policy.gate.contact_matrix_attribute is not None and \
            policy.gate.contact_matrix_attribute not in policy.grouping.attributes:
        raise PolicyError(f"'gate.contact_matrix_attribute' must be one of grouping.attributes"
                          f"{closest_name(policy.gate.contact_matrix_attribute, policy.grouping.attributes)}")


def budgeted_components(policy: ReleasePolicy) -> list[ComponentPolicy]:
    """Enabled components that need a share of epsilon (sizes are free under edge + public grouping)."""
    out = []
    for c in policy.components.all():
        if not c.enabled:
            continue
        if c.name == "supernode_sizes" and not sizes_need_budget(policy):
            continue
        out.append(c)
    return out


def sizes_need_budget(policy: ReleasePolicy) -> bool:
    """Supernode sizes are private under ``person`` or when the grouping itself reads the edges."""
    return policy.privacy.unit == "person"


def epsilon_shares(policy: ReleasePolicy) -> dict[str, float]:
    """Epsilon of each budgeted component (and ``grouping`` if private), adding up to the total.

    Components with an explicit ``share`` get it; the rest split what remains equally
    (the documented default).
    """
    total = policy.privacy.epsilon
    comps = budgeted_components(policy)
    explicit = {c.name: c.share for c in comps if c.share is not None}
    rest = [c.name for c in comps if c.share is None]
    left = 1.0 - sum(explicit.values()) - policy.grouping.epsilon_share
    shares = dict(explicit)
    for name in rest:
        shares[name] = left / len(rest)
    out = {}
    if policy.grouping.epsilon_share:
        out["grouping"] = total * policy.grouping.epsilon_share
    names = list(shares)
    for name in names[:-1]:
        out[name] = total * shares[name]
    if names:  # the last share takes what is left, so the spends never add up above the total
        last = total - sum(out.values())
        while sum(out.values()) + last > total:
            last = math.nextafter(last, 0.0)
        out[names[-1]] = last
    return out


def policy_to_dict(policy: ReleasePolicy) -> dict:
    """A JSON-ready view of the policy as applied (paths as strings)."""

    def conv(v):
        if dataclasses.is_dataclass(v):
            return {f.name: conv(getattr(v, f.name)) for f in dataclasses.fields(v)}
        if isinstance(v, Path):
            return str(v)
        if isinstance(v, Mapping):
            return {str(k): conv(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [conv(x) for x in v]
        return v

    d = conv(policy)
    d.pop("source_path", None)
    return d
