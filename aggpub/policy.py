"""Release policies: one table of keys drives the strict TOML parser, the dataclasses and the reference.

A policy states the privacy unit, the total epsilon of one release, how people
are grouped into supernodes, which components are released with which share of
the budget, the lifetime ledger, the utility gate and the input column names.

Everything about a key is written once, in :data:`POLICY_KEYS` (section, name,
type, default, allowed values or range, when it is required, a one-line
meaning, a longer explanation and an example); the rules that tie several keys
together are written once, in :data:`POLICY_RULES`. From these:

* the policy dataclasses validate and normalise their own fields when they are
  built (in ``__post_init__``), so a :class:`ReleasePolicy` built in Python
  cannot hold an out-of-range epsilon, an unknown unit or a ``min_size`` below 1;
  the errors are :class:`PolicyError` naming the key and the value received;
* :func:`parse_policy` checks the keys of decoded TOML against the table (an
  unknown key is refused with the closest known key suggested), fills the
  table's defaults and builds the dataclasses, which do the rest;
* :func:`policy_reference` writes ``docs/policy.md``
  (``python scripts/policy_reference.py > docs/policy.md``; the test suite
  regenerates it and compares).

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
    "AssumptionsPolicy",
    "read_policy",
    "parse_policy",
    "policy_to_dict",
    "epsilon_shares",
    "budgeted_components",
    "sizes_need_budget",
    "PRIVACY_UNITS",
    "GROUPING_METHODS",
    "COMPONENT_NAMES",
    "EDGE_ONLY_COMPONENTS",
    "TRIANGLE_AUTO_MAX_PEOPLE",
    "component_enabled",
    "PolicyKey",
    "PolicySection",
    "PolicyRule",
    "POLICY_KEYS",
    "POLICY_SECTIONS",
    "POLICY_RULES",
    "REQUIRED",
    "KINDS",
    "Range",
    "When",
    "Depends",
    "EXAMPLE_POLICY",
    "policy_key",
    "check_value",
    "policy_reference",
    "LayersPolicy",
    "VIEW_COMPONENT",
    "view_names",
    "view_attributes",
]

import dataclasses
import math
import numbers
import os
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from .errors import InputError, PolicyError, closest_name

PRIVACY_UNITS = ("edge", "person")
GROUPING_METHODS = ("attributes", "structure", "attributes+structure", "given", "random")
PRIVATE_GROUPING_METHODS = ("structure", "attributes+structure")
ATTRIBUTE_GROUPING_METHODS = ("attributes", "attributes+structure")
#: The contact views component (issue 13): contact matrices released by attribute value, optionally per layer.
VIEW_COMPONENT = "contact_views"
COMPONENT_NAMES = ("supernode_sizes", "superedge_counts", "degree_histograms", "weight_totals", VIEW_COMPONENT,
                   "degree_sequences", "triangle_count")
#: Components on by default under unit ``edge`` only (no sensitivity is derived for them under ``person``).
EDGE_ONLY_COMPONENTS = ("degree_sequences", "triangle_count")
#: ``triangle_count`` is on by default (unit ``edge``) for up to this many people: counting triangles costs
#: about the sum of squared degrees, so on larger networks it waits to be asked for. The number of people
#: is public under ``edge``; the number of contacts is not, and nothing here reads it.
TRIANGLE_AUTO_MAX_PEOPLE = 100_000
#: Weight of each component in the split of the budget the explicit shares leave (see ``epsilon_shares``).
SHARE_WEIGHTS = {"triangle_count": 1.0}
DEFAULT_SHARE_WEIGHT = 2.0
SUPEREDGE_METHODS = ("auto", "dense", "sparse")
EPSILON_WARN_ABOVE = 10.0


# --------------------------------------------------------------------------- the table's vocabulary


class _Required:
    """Marker of a key that has no default: the policy must set it."""

    def __repr__(self):
        return "REQUIRED"


#: Default of a key that must be given.
REQUIRED = _Required()

#: The value types a key can have, with how the reference names them.
KINDS = {
    "number": "number",
    "integer": "integer",
    "boolean": "boolean",
    "string": "string",
    "strings": "list of strings",
    "path": "string (a path)",
    "levels": "list of tables",
}


@dataclass(frozen=True)
class Range:
    """Allowed numeric range; ``None`` leaves a side open-ended. Numbers must be finite."""

    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False

    def holds(self, v) -> bool:
        if isinstance(v, float) and not math.isfinite(v):
            return False
        if self.low is not None and (v <= self.low if self.low_open else v < self.low):
            return False
        if self.high is not None and (v >= self.high if self.high_open else v > self.high):
            return False
        return True

    def text(self) -> str:
        """``> 0``, ``>= 1`` or ``(0, 1]``."""
        if self.low is not None and self.high is not None:
            return f"{'(' if self.low_open else '['}{self.low:g}, {self.high:g}{')' if self.high_open else ']'}"
        if self.low is not None:
            return f"{'>' if self.low_open else '>='} {self.low:g}"
        return f"{'<' if self.high_open else '<='} {self.high:g}"

    def message(self, kind: str) -> str:
        if kind == "integer":
            return f"must be {self.text()}"
        if self.high is not None and self.low is not None:
            return f"must be a number in {self.text()}"
        return f"must be a finite number {self.text()}"


@dataclass(frozen=True)
class When:
    """A condition on another key of the same section: ``key`` has one of ``values``."""

    key: str
    values: tuple
    reason: str = ""

    def holds(self, obj, section: str) -> bool:
        return getattr(obj, _attr_of(section, self.key)) in self.values

    def text(self, section: str) -> str:
        where = f"{section}.{self.key}" if section else self.key
        return f"{where} is " + " or ".join(_toml_literal(v) for v in self.values)


@dataclass(frozen=True)
class Depends:
    """A default that depends on another key of the same section."""

    key: str
    values: Mapping[Any, Any]
    otherwise: Any

    def resolve(self, obj, section: str):
        return self.values.get(getattr(obj, _attr_of(section, self.key)), self.otherwise)

    def text(self, section: str) -> str:
        by = {}
        for k, v in self.values.items():
            by.setdefault(v, []).append(k)
        parts = [f"{_toml_literal(v)} when {section}.{self.key} is " + " or ".join(_toml_literal(k) for k in ks)
                 for v, ks in by.items()]
        return "; ".join(parts) + f"; {_toml_literal(self.otherwise)} otherwise"


@dataclass(frozen=True)
class PolicyKey:
    """One key of a release policy: everything the parser, the dataclasses and the reference need.

    Attributes
    ----------
    section : str
        The TOML table holding the key (``"privacy"``, ``"components.superedge_counts"``,
        ``"grouping.hierarchies.<attribute>"``); ``""`` for the top level.
    name : str
        The key as written in TOML.
    kind : str
        One of :data:`KINDS`.
    default
        The value used when the key is absent: a value, ``None`` (not set),
        :data:`REQUIRED` or a :class:`Depends`.
    meaning : str
        One line: what the key does.
    details : str
        A longer explanation (Markdown).
    example : str
        A TOML fragment using the key; merged into a minimal policy it must parse.
    choices : tuple
        The allowed values, if the key takes one of a few.
    range : Range, optional
        The allowed numeric range.
    nonempty : bool
        A string or list that must not be empty.
    needed_when, only_when : When, optional
        The key must be set when the condition holds / may be set only when it holds.
    attr : str
        The dataclass field holding the value, when it is not named like the key.
    suggested
        The value a starting policy writes, and the Python default of a required key.
    default_doc : str
        How the reference states a default that code computes (e.g. from other keys).
    allowed_doc : str
        What else the reference says about the allowed values (a rule written elsewhere).
    """

    section: str
    name: str
    kind: str
    default: Any
    meaning: str
    details: str = ""
    example: str = ""
    choices: tuple = ()
    range: Range | None = None
    nonempty: bool = False
    needed_when: When | None = None
    only_when: When | None = None
    attr: str = ""
    suggested: Any = None
    default_doc: str = ""
    allowed_doc: str = ""

    @property
    def path(self) -> str:
        """The dotted name (``privacy.epsilon``)."""
        return f"{self.section}.{self.name}" if self.section else self.name

    @property
    def field(self) -> str:
        return self.attr or self.name

    @property
    def required(self) -> bool:
        return self.default is REQUIRED

    def python_default(self):
        """The dataclass default: the table's default, or the suggested value of a required key."""
        if self.default is REQUIRED:
            return self.suggested
        if isinstance(self.default, Depends):
            return None
        return self.default


@dataclass(frozen=True)
class PolicySection:
    """One TOML table of a policy."""

    name: str
    meaning: str
    details: str = ""
    required: bool = False


@dataclass(frozen=True)
class PolicyRule:
    """A rule tying several keys together, checked when the section's dataclass is built."""

    section: str  # where the rule is checked and documented ("" = the whole policy)
    text: str  # the rule in one sentence, for the reference
    check: Callable[[Any], None]


def _toml_literal(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_literal(x) for x in v) + "]"
    if isinstance(v, float):
        return repr(v)
    return str(v)


# --------------------------------------------------------------------------- the table

_UNIT_PERSON = When("unit", ("person",), "unit 'person' needs the promised cap on contacts per person")

POLICY_SECTIONS: tuple[PolicySection, ...] = (
    PolicySection(
        "", "Top-level keys.",
        "Keys written before the first `[section]` header."),
    PolicySection(
        "privacy", "The privacy unit and the total epsilon of one release.",
        "What one protected unit is, and how much privacy loss this release may spend in all. "
        "`docs/privacy.md` gives the definitions, the sensitivity of every released component under each "
        "unit, and what the guarantee does not cover.",
        required=True),
    PolicySection(
        "grouping", "How people are grouped into supernodes of at least `min_size` members.",
        "A supernode stands for a group of people; only supernode-level numbers are released. Grouping by "
        "public attributes costs no budget under unit `edge`; the structural methods read the contacts and are "
        "paid from `epsilon_share` (`docs/privacy-grouping.md`).",
        required=True),
    PolicySection(
        "grouping.hierarchies.<attribute>", "Generalisation levels of one grouping attribute.",
        "One table per attribute, e.g. `[grouping.hierarchies.age_band]`; `<attribute>` must be one of "
        "`grouping.attributes`. When a cell of people sharing the same values has fewer than `min_size` "
        "members, its values climb these levels (one attribute at a time, in `merge_order`) so it merges with "
        "its neighbours instead of joining the residual supernode."),
    PolicySection(
        "components", "Which components are released, each with its share of epsilon.",
        "Holds one table per component. Components without an explicit `share` split what the explicit "
        "shares (and a private grouping's `epsilon_share`) leave, equally. Supernode sizes need no share under "
        "unit `edge`."),
    PolicySection(
        "components.supernode_sizes", "The number of people in each supernode.",
        "Exact and free under unit `edge` (the person table is public there); noisy, and paid from the "
        "budget, under unit `person`."),
    PolicySection(
        "components.superedge_counts", "Contacts within each supernode and between each pair of supernodes.",
        "Every cell of the upper triangle (diagonal included) gets discrete Laplace noise, zeros included, "
        "or the sparse release below. L1 sensitivity 1 under `edge`, `max_contacts` under `person`."),
    PolicySection(
        "components.degree_histograms", "For each supernode, how many members have 0, 1, 2, ... contacts.",
        "Noisy histograms, made consistent with the supernode sizes afterwards (post-processing). L1 "
        "sensitivity 4 under `edge`, `2 * max_contacts + 1` under `person`."),
    PolicySection(
        "components.weight_totals", "The clipped total weight (e.g. minutes) of the contacts of each cell.",
        "Each contact's weight is clipped to `[0, clip]` and rounded; L1 sensitivity `clip` under `edge`, "
        "`max_contacts * clip` under `person`."),
    # ---- contact views, layers and domains (issue 13)
    PolicySection(
        "components.contact_views", "Contact matrices: contacts between the values of attributes, every "
        "contact placed by its exact values.",
        "One *view* per attribute (or combination of attributes): the number of contacts between people of "
        "value `a` and people of value `b`, for every pair of declared values, zeros included, per layer when "
        "`[layers]` is declared. A view places every contact by the exact values of its two people, also when "
        "their supernodes are labelled with a generalised value or `*`. L1 sensitivity of one view (all of its "
        "layers together): 1 under `edge`, `max_contacts` under `person` (`docs/privacy.md` section 3.3). The "
        "share of the component is split equally among its views. `aggpub matrix` and "
        "`aggpub.contact_matrix` combine the views with the superedge counts by least squares."),
    PolicySection(
        "layers", "The layer (setting) of each contact: an edge column and its declared values.",
        "For example the setting of a contact: household, school, work, community. The values are declared "
        "(the edges are private under both units, so the values present in them are never read to shape the "
        "release), and their order is the public rule for a pair of people recorded in several layers: the "
        "contact counts once, in the first of its layers in this order. Input with a layer value that is not "
        "declared is refused. Views are released per layer; the layers of one view share its epsilon "
        "(parallel composition, `docs/privacy.md` section 3.3). `aggpub release --layer-column NAME` names the "
        "column from the command line."),
    PolicySection(
        "domains", "Declared value domains of view attributes outside the grouping.",
        "Holds one table per attribute, e.g. `[domains.role]`. Under unit `person` the values present in the "
        "person table are private, so every view attribute needs a declared domain: a grouping attribute's is "
        "the first level of its hierarchy, any other attribute's is declared here. Under unit `edge` the person "
        "table is public and a view attribute's domain is the values present, unless declared here."),
    PolicySection(
        "domains.<attribute>", "The declared values of one attribute.",
        "`<attribute>` is a column of the person file. Data holding a value outside the domain are refused."),
    PolicySection(
        "components.degree_sequences", "For each supernode, its members' numbers of contacts, sorted.",
        "Every person's number of contacts, sorted within their supernode, with discrete Laplace noise on every "
        "entry; L1 sensitivity 2 under `edge` (one contact raises two degrees by one, which moves two sorted "
        "positions by one). The released estimates (an isotonic fit rescaled to the consistent superedge "
        "estimates) give synthetic networks their degree heterogeneity (`aggpub sample`). Unit `edge` only: no "
        "sensitivity is derived under `person`, where it is off and enabling it is refused."),
    PolicySection(
        "components.triangle_count", "The number of triangles of the whole network.",
        "Released with the ladder mechanism (its noise follows the network's second largest number of contacts, "
        "a width that is never published); synthetic networks are fitted to it so that they keep local "
        "clustering. Unit `edge` only: no sensitivity is derived under `person`, where it is off and enabling "
        "it is refused. Counting triangles costs about the sum of the squared numbers of contacts, so by "
        f"default it is on only for up to {TRIANGLE_AUTO_MAX_PEOPLE:,} people (a public figure under `edge`)."),
    PolicySection(
        "ledger", "The lifetime budget of one dataset, kept in a file across releases.",
        "Every release of the same people adds up: two releases at epsilon 1 are a release at epsilon 2. With "
        "this section, each release charges its total epsilon to the ledger before the first noise is drawn, "
        "and a release that would exceed `lifetime_epsilon` is refused. Keep one ledger file per dataset and "
        "name it in every policy that releases that dataset. `aggpub ledger FILE` lists the spends."),
    PolicySection(
        "gate", "Utility thresholds a release must meet before it is published.",
        "Each threshold is compared with the error a researcher should expect from the noise, judged only on "
        "values that are already public: before any noise, predicted from the policy, the public inputs and "
        "`[assumptions]` (`aggpub plan`; a release expected to fail is refused uncharged, exit code 6); after "
        "the noise, estimated from the released values and the known law of their noise (a release that "
        "misses a threshold is not published, exit code 6, and its budget stays charged because the noise was "
        "drawn). The decision never reads the true network, so it is covered by the guarantee; the "
        "confidential audit's true-against-released figures decide nothing. Unset thresholds are not checked."),
    PolicySection(
        "assumptions", "Public planning figures the pre-flight may use to predict the gate.",
        "The contacts are private and are never read before the noise, so the pre-flight (`aggpub plan`, and "
        "the check `aggpub release` makes before drawing any noise) needs a public figure for how many "
        "contacts to expect; under unit `person` also for how many people. Take them from public facts (the "
        "study design, a published survey), never from this data. Without them the relative errors and degree "
        "distances are not predicted, and only the gate on the released values judges them."),
    PolicySection(
        "input", "Column names of the input files.",
        "Command-line options (`--source-column`, `--target-column`, `--node-column`, `--weight-column`, "
        "`--drop-unknown`) override these."),
)

_SHARE_DETAILS = ("A fraction of `privacy.epsilon`. When every budgeted component has a share, the shares and "
                  "`grouping.epsilon_share` must add up to 1; otherwise the components without a share split "
                  "what is left, `triangle_count` taking half the part of each other one (with nothing set under "
                  "unit `edge` and an attribute grouping: superedge counts, contact views and degree sequences "
                  "2/7 each, triangle count 1/7; without views 0.4, 0.4, 0.2). A share on a "
                  "disabled component is refused.")


def _component_keys(name, enabled, meaning_enabled, extra_details_enabled="", default_doc=""):
    section = f"components.{name}"
    share_example = {
        "supernode_sizes": '[privacy]\nunit = "person"\nepsilon = 2.0\nmax_contacts = 60\n\n'
                           "[components.supernode_sizes]\nshare = 0.2\n\n[components.superedge_counts]\nshare = 0.8\n",
        "superedge_counts": "[components.superedge_counts]\nshare = 0.7\n\n"
                            "[components.degree_histograms]\nenabled = true\nshare = 0.3\n",
        "degree_histograms": "[components.superedge_counts]\nshare = 0.7\n\n"
                             "[components.degree_histograms]\nenabled = true\nshare = 0.3\n",
        "weight_totals": '[components.weight_totals]\nenabled = true\nshare = 0.5\ncolumn = "minutes"\nclip = 120\n',
        "degree_sequences": "[components.superedge_counts]\nshare = 0.5\n\n[components.degree_sequences]\nshare = 0.4\n",
        "triangle_count": "[components.superedge_counts]\nshare = 0.45\n\n[components.degree_sequences]\nshare = 0.45\n\n"
                          "[components.triangle_count]\nshare = 0.1\n",
    }[name]
    share_details = _SHARE_DETAILS
    if name == "supernode_sizes":
        share_details = ("Under unit `person` only: the noisy sizes are paid from the budget. Under `edge` the sizes "
                         "are exact (public grouping) or post-processing of a private grouping's noisy output, so a "
                         "share is refused. " + _SHARE_DETAILS)
    enabled_example = (f"[{section}]\nenabled = {_toml_literal(not enabled)}\n" if name != "weight_totals" else
                       '[components.weight_totals]\nenabled = true\ncolumn = "minutes"\nclip = 120\n')
    if name == "superedge_counts":
        enabled_example = "[components.superedge_counts]\nenabled = false\n\n" \
                          "[components.degree_histograms]\nenabled = true\n"
    return (
        PolicyKey(section, "enabled", "boolean", enabled, meaning_enabled,
                  extra_details_enabled or "At least one of superedge counts, degree histograms and weight totals "
                  "must be enabled.", enabled_example, default_doc=default_doc),
        PolicyKey(section, "share", "number", None, "share of `privacy.epsilon` spent on this component",
                  share_details, share_example, range=Range(0, 1, low_open=True)),
    )


POLICY_KEYS: tuple[PolicyKey, ...] = (
    # ---------------------------------------------------------------- top level
    PolicyKey(
        "", "title", "string", "", "a name for the release",
        "Copied into the bundle's manifest with the rest of the policy and shown on the confidential report. "
        "It is published: keep private information out of it.",
        'title = "Quennet Vale contacts, spring survey"'),
    # ---------------------------------------------------------------- privacy
    PolicyKey(
        "privacy", "unit", "string", "edge",
        "what one protected unit is: one contact, or one person with all of their contacts",
        "`edge`: neighbouring datasets differ in one contact between two people. The person table (who is in "
        "the data and their attributes) is public, so supernode sizes are released exactly.\n\n"
        "`person`: neighbouring datasets differ in one person together with all of their contacts, on networks "
        "promised to have at most `max_contacts` contacts per person. Supernode sizes get noise too, and every "
        "grouping attribute needs a declared value domain (`[grouping.hierarchies.<attribute>]`), because the "
        "values present in the data are private. Only method `attributes` is available under `person`.",
        '[privacy]\nunit = "person"\nepsilon = 2.0\nmax_contacts = 60\n',
        choices=PRIVACY_UNITS),
    PolicyKey(
        "privacy", "epsilon", "number", REQUIRED, "the total privacy-loss budget of this release",
        "Smaller is more private and noisier. The components (and a private grouping) split it by their "
        "shares, and their spends add up to exactly this value. Above 10 the policy is accepted with a "
        "warning: the guarantee is then weak. Repeated releases of the same people add up; `[ledger]` caps "
        "their sum.",
        "[privacy]\nepsilon = 0.5\n",
        range=Range(0, None, low_open=True), suggested=1.0),
    PolicyKey(
        "privacy", "max_contacts", "integer", None, "the promised cap on contacts per person, for unit `person`",
        "A promise about the data made by the steward. It bounds the sensitivity of superedge counts "
        "(`max_contacts`), degree histograms (`2 * max_contacts + 1`) and weight totals under `person`. Input in "
        "which anyone has more contacts is refused (saying how many people exceed it, never who), never "
        "truncated. A larger cap means more noise.",
        '[privacy]\nunit = "person"\nepsilon = 2.0\nmax_contacts = 60\n',
        range=Range(1, None), needed_when=_UNIT_PERSON, only_when=_UNIT_PERSON),
    # ---------------------------------------------------------------- grouping
    PolicyKey(
        "grouping", "method", "string", "attributes", "how people become supernodes",
        "`attributes`: people with the same values of `attributes` form a cell; small cells climb the "
        "hierarchies, what is still too small joins one residual supernode. Public, no budget under `edge`.\n\n"
        "`structure`: tiers of people with similar noisy degrees (and optional noisy contact-profile rounds). "
        "It reads the contacts, so it is paid from `epsilon_share`.\n\n"
        "`attributes+structure`: attribute cells cut further by noisy degree tiers; paid like `structure`.\n\n"
        "`given`: a public person -> supernode map read from `map`. Sound only if the map is public.\n\n"
        "`random`: people dealt at random into groups of `min_size`; a baseline for the audit.",
        '[grouping]\nmethod = "structure"\nmin_size = 20\n',
        choices=GROUPING_METHODS),
    PolicyKey(
        "grouping", "attributes", "strings", (), "person-table columns whose values define the supernodes",
        "Each is a column of the person file. Listed once each. Required (at least one) for methods "
        "`attributes` and `attributes+structure`.",
        '[grouping]\nattributes = ["age_band", "neighbourhood"]\nmin_size = 20\n',
        allowed_doc="columns of the person file, each once",
        needed_when=When("method", ATTRIBUTE_GROUPING_METHODS,
                         "methods 'attributes' and 'attributes+structure' need at least one attribute")),
    PolicyKey(
        "grouping", "min_size", "integer", REQUIRED, "the smallest number of people in a released supernode",
        "Every released supernode stands for at least this many people: small cells are generalised up the "
        "hierarchies, and what is still too small joins a residual supernode (its differing values shown as "
        "`*`). Larger values hide individuals better and blur differences between groups. Under `person` the "
        "decisions are taken on noisy counts, so a true size can fall below it.",
        "[grouping]\nmin_size = 50\n",
        range=Range(1, None), suggested=20),
    PolicyKey(
        "grouping", "merge_order", "strings", (), "the order in which the attributes' hierarchies are climbed",
        "A small cell first gives up detail of the first attribute listed, then of the next. Attributes not "
        "listed follow, last attribute first. Each must be one of `attributes`, listed once.",
        '[grouping]\nattributes = ["age_band", "neighbourhood"]\nmin_size = 20\n'
        'merge_order = ["neighbourhood", "age_band"]\n',
        default_doc="the reverse of `attributes`", allowed_doc="names from `attributes`, each once"),
    PolicyKey(
        "grouping", "epsilon_share", "number",
        Depends("method", {m: 0.3 for m in PRIVATE_GROUPING_METHODS}, 0.0),
        "share of `privacy.epsilon` spent on a private (structural) grouping",
        "Only for methods `structure` and `attributes+structure`, which read the contacts: must then be "
        "strictly between 0 and 1. With `rounds = r` it is split into `r + 1` equal parts. For the public "
        "methods it must stay 0.",
        '[grouping]\nmethod = "structure"\nmin_size = 20\nepsilon_share = 0.4\n',
        range=Range(0, 1, high_open=True)),
    PolicyKey(
        "grouping", "tiers", "integer", 8, "structural grouping: the most degree tiers",
        "People are cut into at most this many quantile tiers of their noisy degree (per attribute cell for "
        "`attributes+structure`); tiers smaller than `min_size` merge with a neighbour. Unused by other methods.",
        '[grouping]\nmethod = "structure"\nmin_size = 20\ntiers = 12\n',
        range=Range(1, None)),
    PolicyKey(
        "grouping", "rounds", "integer", 0, "structural grouping: noisy contact-profile refinement rounds",
        "Each round releases, to the grouping step only, every person's noisy number of contacts with each "
        "current group and re-clusters; it costs an equal part of `epsilon_share`. Unused by other methods.",
        '[grouping]\nmethod = "structure"\nmin_size = 20\nrounds = 1\n',
        range=Range(0, None)),
    PolicyKey(
        "grouping", "map", "path", None, "method `given`: the public person -> supernode map",
        "A CSV or Parquet file with columns `node` (the person id, as in the person file) and `supernode` (any "
        "label), relative to the policy file's folder. Every person must be listed once and every supernode must "
        "have at least `min_size` people. No budget is charged, so the map must be public: a map derived from "
        "the contacts is a release of its own and voids the guarantee.",
        '[grouping]\nmethod = "given"\nmin_size = 20\nmap = "districts.csv"\n',
        nonempty=True, attr="map_path",
        needed_when=When("method", ("given",), "method 'given' needs the public person -> supernode map"),
        only_when=When("method", ("given",))),
    # ---------------------------------------------------------------- grouping.hierarchies.<attribute>
    PolicyKey(
        "grouping.hierarchies.<attribute>", "levels", "levels", REQUIRED,
        "generalisation steps: each table maps a value to its broader value",
        "`levels[0]` maps each value of the attribute to a broader value, `levels[1]` maps each of those to a "
        "still broader one, and so on; each level must cover every value the previous level produces. Values "
        "are strings (write numbers in quotes).\n\n"
        "Under `person`, the keys of `levels[0]` are the attribute's declared domain: list every possible value "
        "(mapping a value to itself declares it without generalising), because the values present in the data "
        "are private; data holding a value outside the domain are refused. Under `edge`, a value missing from "
        "`levels[0]` is refused only if it sits in a cell too small to release.\n\n"
        "TOML also allows each level as a table of its own, one value per line (`aggpub draft-policy` writes "
        "this form):\n\n"
        "```toml\n[[grouping.hierarchies.age_band.levels]]\n\"0-4\" = \"0-9\"\n\"5-9\" = \"0-9\"\n\n"
        "[[grouping.hierarchies.age_band.levels]]   # the next step\n\"0-9\" = \"0-19\"\n```",
        allowed_doc="tables value -> broader value, each level covering the values of the one before",
        example='[grouping]\nattributes = ["age_band", "neighbourhood"]\nmin_size = 20\n\n'
        '[grouping.hierarchies.age_band]\n# 5-year bands -> 10-year bands -> 20-year bands\n'
        'levels = [\n  { "0-4" = "0-9", "5-9" = "0-9", "10-14" = "10-19", "15-19" = "10-19" },\n'
        '  { "0-9" = "0-19", "10-19" = "0-19" },\n]\n'),
    # ---------------------------------------------------------------- components
    *_component_keys("supernode_sizes", True, "release the size of each supernode",
                     "Under `person` it must stay enabled: the noisy sizes bound the superedge counts."),
    *_component_keys("superedge_counts", True, "release the noisy contact counts of every cell"),
    PolicyKey(
        "components.superedge_counts", "method", "string", "auto", "how the cells are noised: dense, sparse or auto",
        "`dense`: every cell gets noise and is released, zeros included.\n\n"
        "`sparse`: noisy values are drawn for the non-zero cells and, without touching every empty cell, for the "
        "empty cells whose noise passes `sparse_threshold`; cells below the threshold are not released "
        "(Cormode, Procopiuc, Srivastava, Tran, ICDT 2012). Same distribution as dense-then-threshold.\n\n"
        "`auto`: dense below `sparse_above_cells` cells, sparse from there.",
        '[components.superedge_counts]\nmethod = "sparse"\n',
        choices=SUPEREDGE_METHODS),
    PolicyKey(
        "components.superedge_counts", "sparse_threshold", "number", None,
        "sparse release: noisy cells below this value are not released",
        "Rounded up to an integer (noisy counts are integers). By default the smallest threshold that keeps, in "
        "expectation, at most about one empty cell per supernode, computed from public values only (the number "
        "of cells and supernodes and epsilon). Lower keeps more true and more false cells.",
        '[components.superedge_counts]\nmethod = "sparse"\nsparse_threshold = 3.0\n',
        range=Range(0, None, low_open=True),
        default_doc="computed from the number of cells, supernodes and the noise scale"),
    PolicyKey(
        "components.superedge_counts", "sparse_above_cells", "integer", 10_000_000,
        "method `auto`: switch to the sparse release from this many cells",
        "The number of cells is `n * (n + 1) / 2` for `n` supernodes, a public value.",
        "[components.superedge_counts]\nsparse_above_cells = 1000000\n",
        range=Range(1, None)),
    *_component_keys("degree_histograms", False, "release a noisy degree histogram per supernode"),
    PolicyKey(
        "components.degree_histograms", "max_degree", "integer", 50,
        "public cap of the histograms: the top bin counts `max_degree` contacts or more",
        "A public choice, not read from the data. Bins `0 .. max_degree`; a larger cap gives more bins, each "
        "with its own noise.",
        "[components.degree_histograms]\nenabled = true\nmax_degree = 40\n",
        range=Range(1, None)),
    *_component_keys("weight_totals", False, "release noisy clipped weight totals per cell"),
    *_component_keys(
        "degree_sequences", None, "release every supernode's noisy sorted degree sequence",
        "On by default under unit `edge` (unless the explicit shares of the other components already use the "
        "whole budget: a policy that splits the budget itself lists what it wants); off under `person`, where "
        "`enabled = true` is refused (no sensitivity is derived there). Synthetic networks drawn from a release "
        "without it give every member of a supernode the same expected number of contacts.",
        default_doc="on under unit `edge` unless the explicit shares already add up to 1; off under `person`"),
    *_component_keys(
        "triangle_count", None, "release the noisy number of triangles (ladder mechanism)",
        f"On by default under unit `edge` for networks of up to {TRIANGLE_AUTO_MAX_PEOPLE:,} people (unless the "
        "explicit shares of the other components already use the whole budget); `enabled = true` switches it on "
        "at any size (the count then costs time roughly in proportion to the sum of the squared numbers of "
        "contacts). Off under `person`, where `enabled = true` is refused. Without it synthetic networks lose "
        "most local clustering.",
        default_doc=f"on under unit `edge` for up to {TRIANGLE_AUTO_MAX_PEOPLE:,} people (a public figure "
                    "under `edge`) unless the explicit shares already add up to 1; off otherwise and under "
                    "`person`"),
    PolicyKey(
        "components.weight_totals", "column", "string", None, "the edge column holding each contact's weight",
        "A numeric column of the edge file, e.g. a duration in minutes; weights must be finite and "
        "non-negative. Must agree with `input.weight` or `--weight-column` if those are set.",
        '[components.weight_totals]\nenabled = true\ncolumn = "minutes"\nclip = 120\n',
        nonempty=True,
        needed_when=When("enabled", (True,), "weight totals need the edge weight column and the clip bound")),
    PolicyKey(
        "components.weight_totals", "clip", "integer", None, "each contact's weight is clipped to `[0, clip]`",
        "The L1 sensitivity of the totals (times `max_contacts` under `person`): a larger clip keeps long "
        "contacts whole and adds more noise.",
        '[components.weight_totals]\nenabled = true\ncolumn = "minutes"\nclip = 120\n',
        range=Range(1, None),
        needed_when=When("enabled", (True,), "weight totals need the edge weight column and the clip bound")),
    PolicyKey(
        "components.weight_totals", "unit", "string", None, "the unit of the weights, as the reader's guide names it",
        "Free text for readers (e.g. `minutes`); aggpub neither converts nor checks it. Without it the guide says "
        "the weights are in the unit of the column.",
        '[components.weight_totals]\nenabled = true\ncolumn = "minutes"\nclip = 120\nunit = "minutes"\n',
        nonempty=True, attr="weight_unit"),
    # ---------------------------------------------------------------- contact views, layers, domains (issue 13)
    PolicyKey(
        "components.contact_views", "enabled", "boolean", None, "release contact matrices (views) by attribute",
        "On by default for a policy that groups by attributes and sets no component `share` of its own (the "
        "plainest policy): every grouping attribute then gets a complete view, so that every contact is placed "
        "by its exact value even when supernodes are generalised or merged. A policy that splits epsilon by "
        "explicit shares lists every component it wants: add this table with a `share` to release views "
        "there. Off by default for groupings without attributes.",
        "[components.contact_views]\nenabled = false\n",
        default_doc="on (`true`) when there are views to release (the grouping has attributes, or `attributes` / "
                    "`combinations` list some) and either this table sets a `share` or no other component does; "
                    "else `false`"),
    PolicyKey(
        "components.contact_views", "share", "number", None, "share of `privacy.epsilon` spent on all views",
        "Split equally among the views (and their weighted variants). Without it the views take an equal part "
        "with the other components that have no share: 2/7 of epsilon in the plainest policy under unit `edge`, "
        "beside the superedge counts and the degree sequences (2/7 each) and the triangle count (1/7); half of "
        "epsilon beside the superedge counts alone, the split measured in `docs/contact-matrices.md` section 7, "
        "when those two are off. " + _SHARE_DETAILS,
        "[components.superedge_counts]\nshare = 0.6\n\n[components.contact_views]\nshare = 0.4\n",
        range=Range(0, 1, low_open=True)),
    PolicyKey(
        "components.contact_views", "attributes", "strings", None, "the attributes that each get a view",
        "Columns of the person file, each once. Under unit `person` each must be a grouping attribute (its "
        "domain is its hierarchy's first level) or be declared in `[domains.<attribute>]`. An empty list "
        "releases only `combinations`.",
        '[components.contact_views]\nattributes = ["age_band"]\n',
        default_doc="the grouping attributes", allowed_doc="person-file columns, each once"),
    PolicyKey(
        "components.contact_views", "combinations", "strings", (), "combinations of attributes that get a view",
        "Each entry names two or more attributes joined by commas (`\"age_band,neighbourhood\"`): one view of "
        "their combined value. Each combination is one more view and takes an equal part of the share, so "
        "every view becomes noisier.",
        '[components.contact_views]\ncombinations = ["age_band,neighbourhood"]\n',
        allowed_doc="attributes joined by commas, each combination once"),
    PolicyKey(
        "components.contact_views", "weighted", "boolean", False,
        "also release the clipped weight totals (e.g. minutes) by view",
        "Each view then has a weighted twin with the total of `round(min(max(w, 0), clip))` over its contacts, "
        "released in `contact_view_weights.parquet`; it takes an equal part of the share. L1 sensitivity "
        "`clip` under `edge`, `max_contacts * clip` under `person`.",
        '[components.contact_views]\nweighted = true\ncolumn = "minutes"\nclip = 120\n'),
    PolicyKey(
        "components.contact_views", "column", "string", None, "the edge column of the weights of weighted views",
        "A numeric column of the edge file. Must agree with `components.weight_totals.column`, `input.weight` "
        "or `--weight-column` when those are set.",
        '[components.contact_views]\nweighted = true\ncolumn = "minutes"\nclip = 120\n',
        nonempty=True,
        needed_when=When("weighted", (True,), "weighted views need the edge weight column and the clip bound")),
    PolicyKey(
        "components.contact_views", "clip", "integer", None, "weighted views: each weight is clipped to `[0, clip]`",
        "The L1 sensitivity of a weighted view (times `max_contacts` under `person`).",
        '[components.contact_views]\nweighted = true\ncolumn = "minutes"\nclip = 120\n',
        range=Range(1, None),
        needed_when=When("weighted", (True,), "weighted views need the edge weight column and the clip bound")),
    PolicyKey(
        "components.contact_views", "unit", "string", None, "weighted views: the unit of the weights, for readers",
        "Free text for readers (e.g. `minutes`); aggpub neither converts nor checks it.",
        '[components.contact_views]\nweighted = true\ncolumn = "minutes"\nclip = 120\nunit = "minutes"\n',
        nonempty=True, attr="weight_unit"),
    PolicyKey(
        "layers", "column", "string", None, "the edge column holding each contact's layer (setting)",
        "Read as text and compared with `values` exactly. `--layer-column` on the command line overrides it.",
        '[layers]\ncolumn = "setting"\nvalues = ["household", "school", "work", "community"]\n',
        nonempty=True),
    PolicyKey(
        "layers", "values", "strings", (), "the declared layers, in the order that assigns a repeated contact",
        "Every value the layer column may hold, each once. A pair of people recorded in several layers counts "
        "once, in the first of its layers in this order (a public rule that reads only that pair's own rows). "
        "Take the values from the study design, never from the data.",
        '[layers]\ncolumn = "setting"\nvalues = ["household", "school", "work", "community"]\n',
        allowed_doc="distinct non-empty strings; required with `layers.column`"),
    PolicyKey(
        "domains.<attribute>", "values", "strings", REQUIRED, "every possible value of the attribute",
        "In the order the views list them. Take them from a public codebook (the survey form, a published "
        "classification), never from the data.",
        '[domains.age_band]\nvalues = ["0-19", "20-39", "40-59", "60-79", "80+"]\n',
        allowed_doc="distinct non-empty strings"),
    # ---------------------------------------------------------------- ledger
    PolicyKey(
        "ledger", "path", "path", REQUIRED, "the ledger file (SQLite), relative to the policy file's folder",
        "Created on first use. Use one ledger file per dataset and keep it with the dataset's records: the "
        "ledger is the only thing that keeps repeated releases of the same people bounded. Its entries are "
        "hash-chained; `aggpub ledger FILE` verifies and lists them.",
        '[ledger]\npath = "quennet-vale.ledger"\ndataset = "quennet-vale-contacts-2026"\nlifetime_epsilon = 3.0\n',
        nonempty=True),
    PolicyKey(
        "ledger", "dataset", "string", REQUIRED, "the identifier of the dataset whose releases add up",
        "Name the people, not the release: every release of the same people uses the same identifier.",
        '[ledger]\npath = "quennet-vale.ledger"\ndataset = "quennet-vale-contacts-2026"\nlifetime_epsilon = 3.0\n',
        nonempty=True),
    PolicyKey(
        "ledger", "lifetime_epsilon", "number", REQUIRED, "the most epsilon all releases of the dataset may spend",
        "The sum agreed with the governance board. A release whose epsilon would take the total above it is "
        "refused before any noise is drawn.",
        '[ledger]\npath = "quennet-vale.ledger"\ndataset = "quennet-vale-contacts-2026"\nlifetime_epsilon = 3.0\n',
        range=Range(0, None, low_open=True)),
    # ---------------------------------------------------------------- gate
    PolicyKey(
        "gate", "max_degree_ks", "number", None,
        "largest allowed Kolmogorov-Smirnov distance of the degree distribution",
        "The mean distance between the degree distribution the release implies (the noisy degree histograms if "
        "they are released, else the distribution implied by sampling graphs uniformly from the released "
        "supernode sizes and superedge counts) and copies of it re-noised with the same law: the distance the "
        "noise adds. 0 to 1; lower is stricter.",
        "[gate]\nmax_degree_ks = 0.1\n",
        range=Range(0, None)),
    PolicyKey(
        "gate", "max_degree_wasserstein", "number", None,
        "largest allowed Wasserstein-1 distance of the degree distribution",
        "In contacts per person, measured like `max_degree_ks` (release against re-noised copies of itself): "
        "how far the noise moves the degree distribution.",
        "[gate]\nmax_degree_wasserstein = 2.0\n",
        range=Range(0, None)),
    PolicyKey(
        "gate", "max_contact_matrix_median_relative_error", "number", None,
        "largest allowed median relative error of the contact matrix",
        "Over the entries of the contact matrix by `contact_matrix_attribute` (contacts between the values of "
        "one attribute, summed from the superedge cells): the expected absolute noise of the entry (exact law "
        "of a sum of discrete Laplace draws) over its released (unbiased) value, with a sanity bound of 0.1% "
        "of the released contacts.",
        "[gate]\nmax_contact_matrix_median_relative_error = 0.1\n",
        range=Range(0, None)),
    PolicyKey(
        "gate", "max_superedge_median_relative_error", "number", None,
        "largest allowed median relative error of the superedge cells",
        "Over every superedge cell: the expected absolute noise `E|Z|` over `max(released, s)`, the released "
        "value being the unbiased (unclamped) count and `s` a sanity bound of 0.1% of the released contacts.",
        "[gate]\nmax_superedge_median_relative_error = 0.5\n",
        range=Range(0, None)),
    PolicyKey(
        "gate", "contact_matrix_attribute", "string", None, "the attribute of the gated contact matrix",
        "One of `grouping.attributes`.",
        '[gate]\nmax_contact_matrix_median_relative_error = 0.1\ncontact_matrix_attribute = "age_band"\n',
        default_doc="the first of `grouping.attributes`", allowed_doc="one of `grouping.attributes`"),
    # ---------------------------------------------------------------- assumptions
    PolicyKey(
        "assumptions", "contacts_per_person", "number", None,
        "expected contacts per person, a public planning figure for the pre-flight",
        "Used only to predict the gate before any noise (`aggpub plan` and the pre-flight of `aggpub release`): "
        "the predicted contacts are spread over the supernode pairs in proportion to their possible pairs. "
        "Take it from the study design or a published survey (for example the daily contacts reported by "
        "Mossong et al., PLoS Medicine 2008), never from this data.",
        "[assumptions]\ncontacts_per_person = 11.0\n",
        range=Range(0, None, low_open=True)),
    PolicyKey(
        "assumptions", "people", "integer", None,
        "expected number of people, a public planning figure for the pre-flight under unit `person`",
        "Under unit `person` the person file is private and is not read before the noise: the pre-flight "
        "spreads this many people evenly over the declared attribute domains. Take it from a census or the "
        "study's sampling frame. Under unit `edge` the person table is public and this key is not needed.",
        "[assumptions]\npeople = 30000\n",
        range=Range(1, None)),
    # ---------------------------------------------------------------- input
    PolicyKey("input", "source", "string", "source", "edge column of the first person of a contact", "",
              '[input]\nsource = "person_a"\n', nonempty=True),
    PolicyKey("input", "target", "string", "target", "edge column of the second person of a contact", "",
              '[input]\ntarget = "person_b"\n', nonempty=True),
    PolicyKey("input", "node", "string", "node", "person-file column holding the person id",
              "Ids are text; CSV ids are read verbatim (`007` stays `007`).",
              '[input]\nnode = "resident_id"\n', nonempty=True),
    PolicyKey("input", "weight", "string", None, "edge column holding each contact's weight",
              "Read only when weight totals are enabled; duplicate rows of a contact have their weights summed.",
              '[input]\nweight = "minutes"\n', nonempty=True),
    PolicyKey("input", "drop_unknown", "boolean", False,
              "drop edges naming people missing from the person file instead of refusing the input",
              "The number of rows dropped is reported, never the ids.",
              "[input]\ndrop_unknown = true\n"),
)

_KEYS: dict[tuple[str, str], PolicyKey] = {(k.section, k.name): k for k in POLICY_KEYS}
_KEYS_BY_SECTION: dict[str, tuple[PolicyKey, ...]] = {
    s.name: tuple(k for k in POLICY_KEYS if k.section == s.name) for s in POLICY_SECTIONS}
_SECTION_NAMES = tuple(s.name for s in POLICY_SECTIONS)


def policy_key(path: str) -> PolicyKey:
    """The table entry of a key by its dotted name (``"privacy.epsilon"``)."""
    section, _, name = path.rpartition(".")
    try:
        return _KEYS[(section, name)]
    except KeyError:
        raise KeyError(path) from None


def _subsections(section: str) -> tuple[str, ...]:
    """Names of the tables directly inside ``section`` (``"hierarchies"`` in ``grouping``)."""
    if not section:
        return tuple(s for s in _SECTION_NAMES if s and "." not in s)
    prefix = f"{section}."
    return tuple(dict.fromkeys(s[len(prefix):].split(".")[0] for s in _SECTION_NAMES if s.startswith(prefix)))


def _known_names(section: str) -> list[str]:
    return [k.name for k in _KEYS_BY_SECTION[section]] + list(_subsections(section))


def _attr_of(section: str, key: str) -> str:
    return _KEYS[(section, key)].field


def _default(section: str, name: str):
    return _KEYS[(section, name)].python_default()


# --------------------------------------------------------------------------- values: type and range


def _typename(value):
    if value is None:
        return "nothing"
    return {str: "a string", bool: "a boolean", int: "an integer", float: "a number",
            list: "a list", tuple: "a list", dict: "a table"}.get(type(value), type(value).__name__)


def _convert(key: PolicyKey, value, path: str | None = None):
    """``value`` checked against the key's type, range and choices; normalised (int -> float, list -> tuple)."""
    path = path or key.path
    kind = key.kind
    if kind == "number":
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise PolicyError(f"'{path}' must be a number, got {_typename(value)} {value!r}")
        value = float(value)
    elif kind == "integer":
        if isinstance(value, bool) or not isinstance(value, numbers.Integral):
            raise PolicyError(f"'{path}' must be an integer, got {_typename(value)} {value!r}")
        value = int(value)
    elif kind == "boolean":
        if not isinstance(value, bool):
            raise PolicyError(f"'{path}' must be true or false, got {_typename(value)} {value!r}")
    elif kind == "string":
        if not isinstance(value, str):
            raise PolicyError(f"'{path}' must be a string, got {_typename(value)} {value!r}")
    elif kind == "strings":
        if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) for v in value):
            raise PolicyError(f"'{path}' must be a list of strings, got {_typename(value)} {value!r}")
        value = tuple(value)
    elif kind == "path":
        if not isinstance(value, (str, os.PathLike)):
            raise PolicyError(f"'{path}' must be a string (a path), got {_typename(value)} {value!r}")
        if key.nonempty and not str(value).strip():
            raise PolicyError(f"'{path}' must not be empty")
        value = Path(value)
    else:  # pragma: no cover - the table only uses the kinds above
        raise AssertionError(kind)
    if key.range is not None and not key.range.holds(value):
        raise PolicyError(f"'{path}' {key.range.message(kind)}, got {value!r}")
    if key.choices and value not in key.choices:
        raise PolicyError(f"'{path}' must be one of " + ", ".join(repr(o) for o in key.choices) + f", got {value!r}")
    if key.nonempty and kind == "string" and not value.strip():
        raise PolicyError(f"'{path}' must not be empty")
    return value


def check_value(path: str, value):
    """``value`` checked against the table entry of key ``path`` (type, range, choices), normalised.

    Raises
    ------
    PolicyError
        Naming the key and the value received.
    """
    return _convert(policy_key(path), value)


def _validate_fields(obj, section: str, keys=None) -> None:
    """Check and normalise every field of a section's dataclass against the table, then its rules."""
    keys = _KEYS_BY_SECTION[section] if keys is None else keys
    not_given = set()
    for key in keys:
        value = getattr(obj, key.field)
        if value is None:
            not_given.add(key.name)
        if value is None and isinstance(key.default, Depends):
            value = key.default.resolve(obj, section)
        elif value is None and key.default is not None and key.default is not REQUIRED:
            value = key.default
        if value is None:
            if key.required:
                raise PolicyError(f"missing key '{key.path}'")
        else:
            value = _convert(key, value)
        object.__setattr__(obj, key.field, value)
    for key in keys:
        value = getattr(obj, key.field)
        unset = value is None or (key.kind == "strings" and not value)
        if key.needed_when is not None and key.needed_when.holds(obj, section) and unset:
            reason = f": {key.needed_when.reason}" if key.needed_when.reason else ""
            if key.name in not_given:
                raise PolicyError(f"missing key '{key.path}'{reason}")
            raise PolicyError(f"'{key.path}' must not be empty{reason}")
        if key.only_when is not None and not unset and not key.only_when.holds(obj, section):
            other = getattr(obj, _attr_of(section, key.only_when.key))
            raise PolicyError(f"'{key.path}' only applies when {key.only_when.text(section)}, "
                              f"not {_toml_literal(other)}")
    for rule in POLICY_RULES:
        if rule.section == section:
            rule.check(obj)


# --------------------------------------------------------------------------- dataclasses


@dataclass(frozen=True)
class PrivacyPolicy:
    """``[privacy]``: the neighbouring relation and the total epsilon of one release."""

    unit: str = _default("privacy", "unit")
    epsilon: float = _default("privacy", "epsilon")
    max_contacts: int | None = _default("privacy", "max_contacts")

    def __post_init__(self):
        _validate_fields(self, "privacy")


@dataclass(frozen=True)
class GroupingPolicy:
    """``[grouping]``: how people become supernodes of at least ``min_size`` members.

    ``hierarchies`` maps an attribute to its generalisation levels; each level is
    a mapping from a value to its coarser value. ``merge_order`` lists the
    attributes in the order their hierarchies are climbed (default: the reverse
    of ``attributes``, so the last attribute is generalised first; a partial
    order is completed that way when the policy is built).
    """

    method: str = _default("grouping", "method")
    attributes: tuple[str, ...] = _default("grouping", "attributes")
    min_size: int = _default("grouping", "min_size")
    hierarchies: Mapping[str, tuple[Mapping[str, str], ...]] = field(default_factory=dict)
    merge_order: tuple[str, ...] = _default("grouping", "merge_order")
    epsilon_share: float = _default("grouping", "epsilon_share")  # None: the table's default for the method
    tiers: int = _default("grouping", "tiers")  # structure grouping: number of degree tiers
    rounds: int = _default("grouping", "rounds")  # structure grouping: profile refinement rounds
    map_path: Path | None = _default("grouping", "map")  # method "given": CSV/Parquet with node, supernode
    seed_note: str = ""

    def __post_init__(self):
        _validate_fields(self, "grouping")


@dataclass(frozen=True)
class ComponentPolicy:
    """One released component: switch, share of epsilon and its own options.

    Only the options of the component named ``name`` may differ from their
    defaults (``max_degree`` for degree histograms, ``column`` and ``clip`` for
    weight totals, ``method``, ``sparse_threshold`` and ``sparse_above_cells``
    for superedge counts); unset options take the table's defaults.
    """

    name: str
    enabled: bool | None  # None: on or off by the rules of its key's default (degree sequences, triangle count)
    share: float | None = None
    max_degree: int | None = None  # degree histograms: public cap (top bin = cap or more)
    column: str | None = None  # weight totals: the edge weight column
    clip: int | None = None  # weight totals: weights clipped to [0, clip]
    weight_unit: str | None = None  # weight totals, weighted views: the weights' unit, for readers only
    method: str = _default("components.superedge_counts", "method")  # superedge counts: dense, sparse or auto
    sparse_threshold: float | None = None  # sparse release: noisy cells below are dropped
    sparse_above_cells: int = _default("components.superedge_counts", "sparse_above_cells")
    # contact views (issue 13): attributes with a view (None: the grouping attributes), combinations, weights
    attributes: tuple[str, ...] | None = None
    combinations: tuple[str, ...] = ()
    weighted: bool = False

    def __post_init__(self):
        if self.name not in COMPONENT_NAMES:
            raise PolicyError(f"unknown component '{self.name}'{closest_name(self.name, COMPONENT_NAMES)}; "
                              "one of " + ", ".join(COMPONENT_NAMES))
        section = f"components.{self.name}"
        own = {k.field for k in _KEYS_BY_SECTION[section]}
        for f in dataclasses.fields(self):
            if f.name in ("name",) or f.name in own:
                continue
            if getattr(self, f.name) != f.default:
                raise PolicyError(f"'{section}' has no key '{f.name}' (it belongs to another component), "
                                  f"got {getattr(self, f.name)!r}")
        _validate_fields(self, section)


@dataclass(frozen=True)
class ComponentsPolicy:
    """``[components]``: which components are released."""

    supernode_sizes: ComponentPolicy
    superedge_counts: ComponentPolicy
    degree_histograms: ComponentPolicy
    weight_totals: ComponentPolicy
    contact_views: ComponentPolicy | None = None  # None: the defaults (resolved with the whole policy)
    degree_sequences: ComponentPolicy | None = None  # None: default (resolved with the privacy unit)
    triangle_count: ComponentPolicy | None = None

    def __post_init__(self):
        if self.contact_views is None:
            object.__setattr__(self, "contact_views", ComponentPolicy(VIEW_COMPONENT, None))
        for name in EDGE_ONLY_COMPONENTS:
            if getattr(self, name) is None:
                object.__setattr__(self, name, ComponentPolicy(name, None))
        for name in COMPONENT_NAMES:
            c = getattr(self, name)
            if not isinstance(c, ComponentPolicy) or c.name != name:
                raise PolicyError(f"'components.{name}' must be a ComponentPolicy named '{name}', got {c!r}")
        for rule in POLICY_RULES:
            if rule.section == "components":
                rule.check(self)

    def all(self) -> tuple[ComponentPolicy, ...]:
        return tuple(getattr(self, name) for name in COMPONENT_NAMES)


@dataclass(frozen=True)
class LedgerPolicy:
    """``[ledger]``: the persistent lifetime budget of one dataset."""

    path: Path
    dataset: str
    lifetime_epsilon: float

    def __post_init__(self):
        _validate_fields(self, "ledger")


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

    def __post_init__(self):
        _validate_fields(self, "gate")


@dataclass(frozen=True)
class AssumptionsPolicy:
    """``[assumptions]``: public planning figures the pre-flight may use (never read from the data)."""

    contacts_per_person: float | None = None
    people: int | None = None

    def __post_init__(self):
        _validate_fields(self, "assumptions")


@dataclass(frozen=True)
class InputPolicy:
    """``[input]``: column names of the input files (command-line options override)."""

    source: str = _default("input", "source")
    target: str = _default("input", "target")
    node: str = _default("input", "node")
    weight: str | None = _default("input", "weight")
    drop_unknown: bool = _default("input", "drop_unknown")

    def __post_init__(self):
        _validate_fields(self, "input")


@dataclass(frozen=True)
class LayersPolicy:
    """``[layers]``: the edge column holding each contact's layer and its declared values (issue 13).

    Not declared when ``column`` is ``None``. ``values`` are in the order of the
    public one-layer rule: a pair recorded in several layers counts in the first.
    """

    column: str | None = _default("layers", "column")
    values: tuple[str, ...] = _default("layers", "values")

    def __post_init__(self):
        _validate_fields(self, "layers")

    @property
    def declared(self) -> bool:
        return self.column is not None


_SECTION_CLASSES = {"privacy": PrivacyPolicy, "grouping": GroupingPolicy, "components": ComponentsPolicy,
                    "ledger": LedgerPolicy, "gate": GatePolicy, "assumptions": AssumptionsPolicy,
                    "input": InputPolicy}


@dataclass(frozen=True)
class ReleasePolicy:
    """A whole release policy.

    Building one checks each section's type and the rules that tie sections
    together (:data:`POLICY_RULES` of section ``""``); each section checked its
    own keys when it was built.
    """

    privacy: PrivacyPolicy
    grouping: GroupingPolicy
    components: ComponentsPolicy
    ledger: LedgerPolicy | None = None
    gate: GatePolicy = field(default_factory=GatePolicy)
    input: InputPolicy = field(default_factory=InputPolicy)
    title: str = _default("", "title")
    assumptions: AssumptionsPolicy = field(default_factory=AssumptionsPolicy)
    source_path: Path | None = None
    layers: "LayersPolicy" = field(default_factory=lambda: LayersPolicy())  # issue 13: the layer column
    domains: Mapping[str, tuple[str, ...]] = field(default_factory=dict)  # issue 13: declared view domains

    def __post_init__(self):
        for name, cls in _SECTION_CLASSES.items():
            value = getattr(self, name)
            if name == "ledger" and value is None:
                continue
            if not isinstance(value, cls):
                raise PolicyError(f"'{name}' must be a {cls.__name__}, got {_typename(value)}")
        if self.source_path is not None and not isinstance(self.source_path, Path):
            object.__setattr__(self, "source_path", Path(self.source_path))
        _validate_fields(self, "")

    def replace(self, **changes) -> "ReleasePolicy":
        """A copy with some top-level sections replaced (checked like a new policy)."""
        return dataclasses.replace(self, **changes)


# --------------------------------------------------------------------------- rules tying keys together

POLICY_RULES: list[PolicyRule] = []


def _rule(section: str, text: str):
    def register(fn):
        POLICY_RULES.append(PolicyRule(section, text, fn))
        return fn
    return register


@_rule("grouping", "`attributes` lists each attribute once.")
def _attributes_once(g: GroupingPolicy):
    if len(set(g.attributes)) != len(g.attributes):
        raise PolicyError("'grouping.attributes' lists an attribute twice")


@_rule("grouping", "`merge_order` names only attributes of `attributes`, each once; the attributes it leaves out "
                   "follow, last attribute first.")
def _merge_order(g: GroupingPolicy):
    for a in g.merge_order:
        if a not in g.attributes:
            raise PolicyError(f"'grouping.merge_order' names '{a}', which is not in grouping.attributes"
                              f"{closest_name(a, g.attributes)}")
    if len(set(g.merge_order)) != len(g.merge_order):
        raise PolicyError("'grouping.merge_order' lists an attribute twice")
    full = tuple(g.merge_order) + tuple(a for a in reversed(g.attributes) if a not in g.merge_order)
    object.__setattr__(g, "merge_order", full)


@_rule("grouping", "`epsilon_share` is strictly between 0 and 1 for the methods `structure` and "
                   "`attributes+structure`, and 0 for the others.")
def _epsilon_share(g: GroupingPolicy):
    if g.method in PRIVATE_GROUPING_METHODS and not (0 < g.epsilon_share < 1):
        raise PolicyError(f"'grouping.epsilon_share' must be in (0, 1) for method '{g.method}', "
                          f"got {g.epsilon_share!r}")
    if g.method not in PRIVATE_GROUPING_METHODS and g.epsilon_share != 0.0:
        raise PolicyError(f"'grouping.epsilon_share' only applies to private grouping methods, not '{g.method}', "
                          f"got {g.epsilon_share!r}")


@_rule("grouping", "Each `[grouping.hierarchies.<attribute>]` names one of `attributes`; its `levels` is a non-empty "
                   "list of non-empty tables mapping strings to strings, each level covering every value the "
                   "previous level produces.")
def _hierarchies(g: GroupingPolicy):
    if not isinstance(g.hierarchies, Mapping):
        raise PolicyError(f"'grouping.hierarchies' must be a table attribute -> levels, got {_typename(g.hierarchies)}")
    out = {}
    for attr, levels in g.hierarchies.items():
        if attr not in g.attributes:
            raise PolicyError(f"unknown key 'grouping.hierarchies.{attr}': not one of grouping.attributes"
                              f"{closest_name(attr, g.attributes)}")
        out[attr] = _check_levels(levels, f"grouping.hierarchies.{attr}.levels")
    object.__setattr__(g, "hierarchies", out)


def _check_levels(levels, key):
    """``levels = [ {fine = coarse, ...}, {coarse = coarser, ...} ]`` checked, as a tuple of dicts."""
    if not isinstance(levels, (list, tuple)) or not levels:
        raise PolicyError(f"'{key}' must be a non-empty list of tables value -> coarser value")
    out = []
    for i, level in enumerate(levels):
        where = f"{key}[{i}]"
        if not isinstance(level, Mapping) or not level:
            raise PolicyError(f"'{where}' must be a non-empty table value -> coarser value")
        for k, v in level.items():
            if not isinstance(k, str):
                raise PolicyError(f"'{where}' keys must be strings, got {_typename(k)}")
            if not isinstance(v, str):
                raise PolicyError(f"'{where}.{k}' must map to a string, got {_typename(v)}")
        out.append(dict(level))
    for i in range(1, len(out)):
        missing = set(out[i - 1].values()) - set(out[i])
        if missing:
            raise PolicyError(f"'{key}[{i}]' does not cover {len(missing)} value(s) "
                              f"of level {i - 1}: {sorted(missing)[:5]}")
    return tuple(out)


@_rule("components", "At least one of `superedge_counts`, `degree_histograms` and `weight_totals` is enabled.")
def _one_component(c: ComponentsPolicy):
    if not (c.superedge_counts.enabled or c.degree_histograms.enabled or c.weight_totals.enabled):
        raise PolicyError("'components': at least one of superedge_counts, degree_histograms, "
                          "weight_totals must be enabled")


@_rule("", "Under unit `person`, `components.degree_sequences` and `components.triangle_count` are off and "
           "`enabled = true` is refused (no sensitivity is derived for them there). Under unit `edge`, each of them "
           "left unset is on, except when the explicit shares (with `grouping.epsilon_share`) already add up to 1; "
           f"`triangle_count` then still waits for the number of people (on up to {TRIANGLE_AUTO_MAX_PEOPLE:,}).")
def _edge_only_defaults(policy: ReleasePolicy):
    if policy.privacy.unit == "edge":
        return  # the defaults are resolved where they are read (component_enabled)
    for name in EDGE_ONLY_COMPONENTS:
        c = getattr(policy.components, name)
        if c.enabled or c.share is not None:
            what = {"degree_sequences": "sorted degree sequences", "triangle_count": "the triangle count"}[name]
            key = "enabled" if c.enabled else "share"
            raise PolicyError(f"'components.{name}.{key}' is set: no sensitivity is derived for {what} under unit "
                              f"'{policy.privacy.unit}', so it cannot be released; remove the key (it is off under "
                              "this unit) or release degree histograms instead")


@_rule("", "Under unit `edge`, `components.supernode_sizes.share` is not set: the sizes are exact (public "
           "grouping) or post-processing of a private grouping's noisy output.")
def _sizes_share_under_edge(policy: ReleasePolicy):
    if policy.privacy.unit == "edge" and policy.components.supernode_sizes.share is not None:
        # public grouping: sensitivity 0; private grouping: the sizes are post-processing of its noisy
        # output (already charged as 'grouping'). Either way a share here would be silently unused.
        raise PolicyError("'components.supernode_sizes.share': under unit 'edge' the sizes are released "
                          "exactly (public grouping, or post-processing of a private one); remove the share")


@_rule("", "A disabled component has no `share` (it would go unused).")
def _share_of_disabled(policy: ReleasePolicy):
    for c in policy.components.all():
        if c.share is not None and c.enabled is False:
            raise PolicyError(f"'components.{c.name}.share' is set but the component is not enabled; "
                              "its share would go unused")


@_rule("", "Under unit `person`, `components.supernode_sizes.enabled` is true: the noisy sizes bound the "
           "superedge counts.")
def _sizes_under_person(policy: ReleasePolicy):
    if policy.privacy.unit == "person" and not policy.components.supernode_sizes.enabled:
        raise PolicyError("'components.supernode_sizes.enabled' must be true under unit 'person': "
                          "the noisy sizes are needed to bound the superedge counts")


@_rule("", "When every budgeted component has a `share`, the shares and `grouping.epsilon_share` add up to 1; "
           "when only some have one, they add up to less than 1 (the others split the rest equally).")
def _shares_add_up(policy: ReleasePolicy):
    budgeted = budgeted_components(policy)
    shares = [c.share for c in budgeted if c.share is not None]
    if shares and len(shares) == len(budgeted):
        total = sum(shares) + policy.grouping.epsilon_share
        if abs(total - 1.0) > 1e-9:
            raise PolicyError(f"'components.*.share' and 'grouping.epsilon_share' must add up to 1, "
                              f"got {total:g}")
    elif shares and sum(shares) + policy.grouping.epsilon_share >= 1.0:
        raise PolicyError("'components.*.share': the explicit shares leave nothing for the other components")


@_rule("", "`gate.contact_matrix_attribute` is one of `grouping.attributes`.")
def _gate_attribute(policy: ReleasePolicy):
    attr = policy.gate.contact_matrix_attribute
    if attr is not None and attr not in policy.grouping.attributes:
        raise PolicyError(f"'gate.contact_matrix_attribute' must be one of grouping.attributes"
                          f"{closest_name(attr, policy.grouping.attributes)}, got {attr!r}")


# ---- contact views, layers and domains (issue 13)

def _view_sections(top: "_Section", base_dir: Path) -> dict:
    """``layers`` and ``domains`` keyword arguments of :class:`ReleasePolicy` from decoded TOML."""
    out = {}
    layers_sec = top.section("layers")
    if layers_sec is not None:
        out["layers"] = LayersPolicy(**_section_values(layers_sec, "layers", base_dir))
    domains_sec = top.section("domains")
    if domains_sec is not None:
        for attr, spec in domains_sec.data.items():
            if not isinstance(spec, Mapping):
                raise PolicyError(f"unknown key 'domains.{attr}': [domains] holds one table per attribute, "
                                  f"[domains.{attr}] with its 'values'")
        out["domains"] = {attr: _section_values(domains_sec.section(attr), "domains.<attribute>", base_dir)["values"]
                          for attr in domains_sec.data}
    return out


def _distinct_strings(values, key: str) -> tuple:
    values = tuple(values)
    if any(not isinstance(v, str) or not v.strip() for v in values):
        raise PolicyError(f"'{key}' must hold non-empty strings")
    if len(set(values)) != len(values):
        raise PolicyError(f"'{key}' lists a value twice")
    return values


@_rule("layers", "`column` and `values` are set together; `values` lists distinct, non-empty strings.")
def _layers_declared(lay: LayersPolicy):
    if (lay.column is None) != (not lay.values):
        raise PolicyError("'layers.column' and 'layers.values' must be set together: the layer column and "
                          "every layer it may hold")
    object.__setattr__(lay, "values", _distinct_strings(lay.values, "layers.values"))


def view_names(views: ComponentPolicy) -> list[str]:
    """The views of a (resolved) ``components.contact_views``: its attributes, then its combinations."""
    return list(views.attributes or ()) + list(views.combinations)


def view_attributes(policy: "ReleasePolicy") -> list[str]:
    """Every person attribute a release's views read (empty when views are off)."""
    v = policy.components.contact_views
    if not v.enabled:
        return []
    return list(dict.fromkeys(a for name in view_names(v) for a in name.split(",")))


def _resolve_views(policy: "ReleasePolicy"):
    v = policy.components.contact_views
    g = policy.grouping
    explicit_shares = any(c.share is not None for c in policy.components.all() if c.name != VIEW_COMPONENT)
    if v.attributes is None:
        object.__setattr__(v, "attributes", tuple(g.attributes))
    if v.enabled is None:  # the documented default: the plainest policy gets a view of every grouping attribute
        object.__setattr__(v, "enabled", bool(v.attributes or v.combinations)
                           and (v.share is not None or not explicit_shares))
    if not v.enabled:
        return
    attrs = _distinct_strings(v.attributes, "components.contact_views.attributes")
    object.__setattr__(v, "attributes", attrs)
    combos = []
    for c in _distinct_strings(v.combinations, "components.contact_views.combinations"):
        parts = tuple(x.strip() for x in c.split(","))
        if len(parts) < 2 or len(set(parts)) != len(parts) or not all(parts):
            raise PolicyError(f"'components.contact_views.combinations': {c!r} must name two or more different "
                              "attributes joined by commas")
        combos.append(",".join(parts))
    if len(set(combos)) != len(combos):
        raise PolicyError("'components.contact_views.combinations' lists a combination twice")
    object.__setattr__(v, "combinations", tuple(combos))
    if not attrs and not combos:
        raise PolicyError("'components.contact_views': enabled but no view: list 'attributes' or 'combinations' "
                          "(the grouping has no attributes to default to)")
    if policy.privacy.unit == "person":  # (a grouping attribute's hierarchy is demanded by the grouping itself)
        for a in view_attributes(policy):
            if a not in policy.domains and a not in g.attributes:
                raise PolicyError(f"'components.contact_views': under unit 'person' the view attribute '{a}' needs "
                                  f"a declared domain: [domains.{a}] values, or the first level of "
                                  f"[grouping.hierarchies.{a}] (the values present in the data are private)")


_VIEW_RULE_TEXT = ("`components.contact_views` is resolved first: `attributes` defaults to the grouping attributes; "
                   "`enabled` defaults to true when there are views to release and either the table sets a "
                   "`share` or no other component does; combinations name two or more different attributes; under unit `person` every view "
                   "attribute outside the grouping has a declared domain (`[domains.<attribute>]`).")
# resolved before the rules that read `enabled` (shares of disabled components, shares adding up)
POLICY_RULES.insert(next(i for i, r in enumerate(POLICY_RULES) if r.section == ""),
                    PolicyRule("", _VIEW_RULE_TEXT, _resolve_views))


@_rule("", "Each `[domains.<attribute>]` lists distinct, non-empty values.")
def _domains_values(policy: "ReleasePolicy"):
    if not isinstance(policy.domains, Mapping):
        raise PolicyError(f"'domains' must be a table attribute -> values, got {_typename(policy.domains)}")
    out = {}
    for attr, values in policy.domains.items():
        vals = _distinct_strings(values, f"domains.{attr}.values")
        if not vals:
            raise PolicyError(f"'domains.{attr}.values' must not be empty")
        out[str(attr)] = vals
    object.__setattr__(policy, "domains", out)


def _check_cross_rules(policy: ReleasePolicy) -> None:
    """The rules tying sections together (run when a :class:`ReleasePolicy` is built)."""
    for rule in POLICY_RULES:
        if rule.section == "":
            rule.check(policy)


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
    """Build a :class:`ReleasePolicy` from decoded TOML.

    The keys are checked against :data:`POLICY_KEYS` here (unknown keys are
    refused with the closest known key suggested, missing required keys are
    named); types, ranges and rules are checked by the dataclasses as they are
    built.

    Examples
    --------
    >>> from aggpub import parse_policy
    >>> policy = parse_policy({"privacy": {"unit": "edge", "epsilon": 1.0},
    ...                        "grouping": {"method": "attributes", "attributes": ["age_band"], "min_size": 20}})
    >>> policy.privacy.epsilon, policy.grouping.min_size
    (1.0, 20)
    >>> parse_policy({"privacy": {"unit": "edge", "epsilom": 1.0},
    ...               "grouping": {"method": "attributes", "attributes": ["age_band"], "min_size": 20}})
    Traceback (most recent call last):
    ...
    aggpub.errors.PolicyError: unknown key 'privacy.epsilom' (did you mean 'epsilon'?)
    """
    base_dir = Path(base_dir) if base_dir is not None else Path.cwd()
    top = _Section(data, "")
    title_kw = _section_values(top, "", base_dir)
    privacy = PrivacyPolicy(**_section_values(top.section("privacy", required=True), "privacy", base_dir))
    grouping_sec = top.section("grouping", required=True)
    grouping_kw = _section_values(grouping_sec, "grouping", base_dir)
    hier_sec = grouping_sec.section("hierarchies")
    if hier_sec is not None:
        levels_section = "grouping.hierarchies.<attribute>"
        hierarchies = {}
        for attr in hier_sec.data:
            sub = hier_sec.section(attr)
            values = _section_values(sub, levels_section, base_dir)
            hierarchies[attr] = values["levels"]
        grouping_kw["hierarchies"] = hierarchies
    grouping = GroupingPolicy(**grouping_kw)
    comp_sec = top.section("components") or _Section({}, "components")
    _section_values(comp_sec, "components", base_dir)  # checks the component names
    components = ComponentsPolicy(**{
        name: ComponentPolicy(name=name, **_section_values(
            comp_sec.section(name) or _Section({}, comp_sec.key(name)), f"components.{name}", base_dir))
        for name in COMPONENT_NAMES})
    ledger_sec = top.section("ledger")
    ledger = LedgerPolicy(**_section_values(ledger_sec, "ledger", base_dir)) if ledger_sec is not None else None
    gate_sec = top.section("gate")
    gate = GatePolicy(**_section_values(gate_sec, "gate", base_dir)) if gate_sec is not None else GatePolicy()
    assumptions_sec = top.section("assumptions")
    assumptions = AssumptionsPolicy(**_section_values(assumptions_sec, "assumptions", base_dir)) \
        if assumptions_sec is not None else AssumptionsPolicy()
    input_sec = top.section("input")
    input_policy = InputPolicy(**_section_values(input_sec, "input", base_dir)) if input_sec is not None \
        else InputPolicy()
    policy = ReleasePolicy(privacy=privacy, grouping=grouping, components=components, ledger=ledger, gate=gate,
                           input=input_policy, assumptions=assumptions, **_view_sections(top, base_dir),
                           source_path=Path(source_path) if source_path is not None else None,
                           **title_kw)
    if policy.privacy.epsilon > EPSILON_WARN_ABOVE:
        warnings.warn(
            f"privacy.epsilon = {policy.privacy.epsilon:g} is above {EPSILON_WARN_ABOVE:g}: the guarantee is weak",
            stacklevel=2,
        )
    return policy


def _section_values(sec: "_Section", section: str, base_dir: Path) -> dict:
    """The keyword arguments of a section's dataclass: keys checked, paths resolved.

    An absent optional key is passed as ``None`` ("not set"): the dataclass fills
    in the table's default, so TOML and Python get the same defaults.
    """
    sec.check_keys(_known_names(section))
    out = {}
    for key in _KEYS_BY_SECTION[section]:
        path = sec.key(key.name)
        if key.name not in sec.data:
            if key.required:
                raise PolicyError(f"missing key '{path}'")
            out[key.field] = None
            continue
        value = sec.data[key.name]
        if key.kind == "path":
            value = base_dir / _convert(key, value, path)
        out[key.field] = value
    return out


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


# --------------------------------------------------------------------------- the budget split


def component_enabled(policy: ReleasePolicy, name: str, n_people: int | None = None) -> bool:
    """Whether component ``name`` is released (its ``enabled`` key, or the rules of its default).

    ``degree_sequences`` and ``triangle_count`` left unset are on under unit ``edge``
    (a ``share`` switches them on too) unless the explicit shares of the other
    components and ``grouping.epsilon_share`` already add up to 1, and off under
    ``person``; an unset ``triangle_count`` is on for up to
    :data:`TRIANGLE_AUTO_MAX_PEOPLE` people. ``n_people`` is the number of people
    (public under ``edge``); ``None`` before the person table is read (counted as on).
    Everything here reads the policy and that public number only.
    """
    c = getattr(policy.components, name)
    if c.enabled is not None:
        return bool(c.enabled)
    if name not in EDGE_ONLY_COMPONENTS or policy.privacy.unit != "edge":
        return False
    if c.share is not None:
        return True
    explicit = sum(o.share for o in policy.components.all()
                   if o.share is not None and o.name not in EDGE_ONLY_COMPONENTS and o.enabled is not False)
    if explicit + policy.grouping.epsilon_share >= 1.0 - 1e-9:
        return False
    if name == "triangle_count" and n_people is not None:
        return int(n_people) <= TRIANGLE_AUTO_MAX_PEOPLE
    return True


def budgeted_components(policy: ReleasePolicy, n_people: int | None = None) -> list[ComponentPolicy]:
    """Enabled components that need a share of epsilon (sizes are free under edge + public grouping)."""
    out = []
    for c in policy.components.all():
        if not component_enabled(policy, c.name, n_people):
            continue
        if c.name == "supernode_sizes" and not sizes_need_budget(policy):
            continue
        out.append(c)
    return out


def sizes_need_budget(policy: ReleasePolicy) -> bool:
    """Supernode sizes are private under ``person`` or when the grouping itself reads the edges."""
    return policy.privacy.unit == "person"


def epsilon_shares(policy: ReleasePolicy, n_people: int | None = None) -> dict[str, float]:
    """Epsilon of each budgeted component (and ``grouping`` if private), adding up to the total.

    Components with an explicit ``share`` get it; the rest split what remains in
    proportion to their weights (:data:`SHARE_WEIGHTS`: ``triangle_count`` 1, every
    other component 2), the documented default. ``n_people`` decides whether an unset
    ``triangle_count`` is on (:func:`component_enabled`; public under unit ``edge``).
    """
    total = policy.privacy.epsilon
    comps = budgeted_components(policy, n_people)
    explicit = {c.name: c.share for c in comps if c.share is not None}
    rest = [c.name for c in comps if c.share is None]
    left = 1.0 - sum(explicit.values()) - policy.grouping.epsilon_share
    weights = {name: SHARE_WEIGHTS.get(name, DEFAULT_SHARE_WEIGHT) for name in rest}
    shares = dict(explicit)
    for name in rest:
        shares[name] = left * weights[name] / sum(weights.values())
    out = {}
    if policy.grouping.epsilon_share:
        out["grouping"] = total * policy.grouping.epsilon_share
    names = list(shares)
    if names:  # the last share takes what is left, so the spends never add up above the total
        from .budget import split_epsilon

        leading = [out["grouping"]] if "grouping" in out else []
        parts = split_epsilon(total, leading + [total * shares[name] for name in names[:-1]])
        out.update(zip(names, parts[len(leading):]))
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


# --------------------------------------------------------------------------- the reference (docs/policy.md)

#: A complete policy using every section; the reference shows it and the tests parse it.
EXAMPLE_POLICY = '''\
# Release policy for the contact survey of the invented town of Quennet Vale.
title = "Quennet Vale contacts: open research release"

[privacy]
unit = "edge"            # one contact between two residents is protected
epsilon = 1.0            # total for this release, shared by the components below

[grouping]
method = "attributes"    # public attributes only: supernode sizes need no budget
attributes = ["age_band", "neighbourhood"]
min_size = 20            # every supernode stands for at least 20 residents
merge_order = ["neighbourhood", "age_band"]   # give up place detail before age detail

[grouping.hierarchies.age_band]
# 5-year bands -> 10-year bands -> 20-year bands
levels = [
  { "0-4" = "0-9", "5-9" = "0-9", "10-14" = "10-19", "15-19" = "10-19", "20-24" = "20-29", "25-29" = "20-29", "30-34" = "30-39", "35-39" = "30-39", "40-44" = "40-49", "45-49" = "40-49", "50-54" = "50-59", "55-59" = "50-59", "60-64" = "60-69", "65-69" = "60-69", "70-74" = "70-79", "75-79" = "70-79", "80+" = "80+" },
  { "0-9" = "0-19", "10-19" = "0-19", "20-29" = "20-39", "30-39" = "20-39", "40-49" = "40-59", "50-59" = "40-59", "60-69" = "60-79", "70-79" = "60-79", "80+" = "80+" },
]

[grouping.hierarchies.neighbourhood]
# neighbourhood -> zone
levels = [
  { "Alderquay" = "Millward", "Brackenholt" = "Millward", "Cinder Row" = "Millward", "Dovecote Green" = "Northreach", "Emberlea" = "Northreach", "Fennick Heights" = "Northreach", "Gorsemoor" = "Southmere", "Hollin Cross" = "Southmere", "Ivywick" = "Southmere", "Juniper Flats" = "Eastling", "Kestrel Bank" = "Eastling", "Loomside" = "Eastling" },
]

[components.supernode_sizes]
enabled = true           # exact and free under unit "edge"

[components.superedge_counts]
share = 0.3              # contacts within and between supernodes
method = "auto"          # dense below 10 million cells, sparse above

[components.degree_histograms]
enabled = true
share = 0.1
max_degree = 40          # public cap; the top bin counts "40 or more"

[components.weight_totals]
enabled = true
share = 0.1
column = "minutes"       # contact duration
clip = 120               # each contact counts for at most 120 minutes

[components.contact_views]
share = 0.2              # complete contact matrices, split equally among the three views
attributes = ["age_band", "neighbourhood", "role"]

[components.degree_sequences]
share = 0.2              # on by default under unit "edge": every supernode's sorted numbers of contacts

[components.triangle_count]
share = 0.1              # on by default under unit "edge" (up to 100,000 people): for clustering in samples

[layers]
column = "setting"       # the setting of each contact, matrices per setting
values = ["household", "school", "work", "community"]   # a pair met in several settings counts in the first

[domains.role]
values = ["preschool", "pupil", "worker", "retired", "other"]

[ledger]
path = "quennet-vale.ledger"          # one ledger file per dataset, relative to this file
dataset = "quennet-vale-contacts-2026"
lifetime_epsilon = 3.0                # all releases of these people together

[gate]
max_degree_ks = 0.10
max_contact_matrix_median_relative_error = 0.25
contact_matrix_attribute = "age_band"

[assumptions]
contacts_per_person = 11.0            # public planning figure (the study design), for the pre-flight

[input]
source = "source"
target = "target"
node = "node"
weight = "minutes"
drop_unknown = false
'''


def _default_text(key: PolicyKey) -> str:
    if key.default_doc:
        return key.default_doc
    if key.required:
        return "required"
    if isinstance(key.default, Depends):
        return key.default.text(key.section)
    if key.default is None:
        return "not set"
    return f"`{_toml_literal(key.default)}`"


def _allowed_text(key: PolicyKey) -> str:
    parts = []
    if key.choices:
        parts.append(", ".join(f"`{_toml_literal(c)}`" for c in key.choices))
    if key.range is not None:
        parts.append(key.range.text() + (" (finite)" if key.kind == "number" else ""))
    if key.nonempty:
        parts.append("not empty")
    if key.allowed_doc:
        parts.append(key.allowed_doc)
    if key.kind == "boolean":
        parts.append("`true`, `false`")
    if key.needed_when is not None:
        parts.append(f"required when {key.needed_when.text(key.section)}")
    if key.only_when is not None:
        parts.append(f"only when {key.only_when.text(key.section)}")
    return "; ".join(parts) or "any"


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _section_title(name: str) -> str:
    return "Top level" if not name else f"`[{name}]`"


def policy_reference(keys=None, sections=None, rules=None) -> str:
    """The Markdown reference of every policy section, key and rule (the text of ``docs/policy.md``).

    Parameters
    ----------
    keys, sections, rules : sequence, optional
        The tables to document (default: :data:`POLICY_KEYS`, :data:`POLICY_SECTIONS`,
        :data:`POLICY_RULES` as they are when called).

    Returns
    -------
    str
        Markdown: the sections, a table of all keys, each key's type, default,
        allowed values, meaning, explanation and example, the rules, the complete
        :data:`EXAMPLE_POLICY` and the starting policy's notes
        (:data:`aggpub.starter.STARTER_REFERENCE`). ``scripts/policy_reference.py``
        prints, writes or checks it.
    """
    from .starter import STARTER_REFERENCE

    keys = POLICY_KEYS if keys is None else tuple(keys)
    sections = POLICY_SECTIONS if sections is None else tuple(sections)
    rules = POLICY_RULES if rules is None else list(rules)
    by_section = {s.name: [k for k in keys if k.section == s.name] for s in sections}

    out = [
        "# Release policy reference",
        "",
        "<!-- Generated from the key table in aggpub/policy.py by `python scripts/policy_reference.py > "
        "docs/policy.md`. Do not edit by hand: the test suite regenerates this file and compares. -->",
        "",
        "A release policy is a TOML file (UTF-8) that states what one release protects and spends, how people "
        "are grouped into supernodes, which components are released, the lifetime ledger and the utility gate. "
        "`aggpub release --policy FILE` reads it strictly: an unknown key is refused with the closest known key "
        "suggested (`unknown key 'privacy.epsilom' (did you mean 'epsilon'?)`), and a wrong type or a value out "
        "of range is refused naming the key and the value received (exit code 4). Relative paths are resolved "
        "against the policy file's folder. The same checks run when the policy objects are built in Python "
        "(`aggpub.policy.ReleasePolicy` and its sections).",
        "",
        "`aggpub draft-policy` writes a commented starting policy for your person file and attributes (see "
        "[Starting policy](#starting-policy-aggpub-draft-policy) below).",
        "",
        "## Sections",
        "",
        "| section | required | what it holds |",
        "|---|---|---|",
    ]
    for s in sections:
        out.append(f"| {_section_title(s.name)} | {'yes' if s.required else 'no'} | {_cell(s.meaning)} |")
    out += ["", "## All keys", "", "| key | type | default | allowed | meaning |", "|---|---|---|---|---|"]
    for k in keys:
        out.append(f"| `{k.path}` | {KINDS[k.kind]} | {_cell(_default_text(k))} | {_cell(_allowed_text(k))} "
                   f"| {_cell(k.meaning)} |")
    for s in sections:
        out += ["", f"## {_section_title(s.name)}", "", s.meaning, ""]
        if s.details:
            out += [s.details, ""]
        own_rules = [r for r in rules if r.section == s.name and s.name]
        if own_rules:
            out += ["Rules checked for this section:", ""] + [f"- {r.text}" for r in own_rules] + [""]
        for k in by_section[s.name]:
            out += [f"### `{k.path}`", "",
                    f"- type: {KINDS[k.kind]}",
                    f"- default: {_default_text(k)}",
                    f"- allowed: {_allowed_text(k)}",
                    f"- meaning: {k.meaning}", ""]
            if k.details:
                out += [k.details, ""]
            if k.example:
                out += ["```toml", k.example.rstrip("\n"), "```", ""]
        if not by_section[s.name]:
            subs = [x.name for x in sections if x.name.startswith(f"{s.name}.")]
            out += ["No keys of its own; its tables: " + ", ".join(f"`[{x}]`" for x in subs) + ".", ""]
    out += ["## Rules across sections", "",
            "Checked when the whole policy is built, after each section has checked its own keys:", ""]
    out += [f"- {r.text}" for r in rules if r.section == ""]
    out += ["", "## A complete example", "",
            "Every section, for the invented town of Quennet Vale (`aggpub demo` writes its people and contacts):",
            "", "```toml", EXAMPLE_POLICY.rstrip("\n"), "```", ""]
    out.append(STARTER_REFERENCE.rstrip("\n"))
    return "\n".join(out).rstrip("\n") + "\n"
