"""The release pipeline: wires ingest -> grouping -> counting -> noise -> post-processing -> bundle.

Each stage is a function of the previous stage's output plus the policy. Only
:func:`run_release` touches files (through ingest and the bundle writer).
"""

from __future__ import annotations

__all__ = ["Release", "build_release", "release_tables", "run_release", "Progress"]

import sys
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import components as comp
from ._version import BUNDLE_FORMAT, __version__
from .bundle.datacard import CAUTIONS, render_datacard
from .bundle.write import write_bundle
from .errors import PolicyError, PrivacyError
from .grouping import Grouping, group_by_attributes
from .ingest import Network, load_network
from .noise.accountant import ReleaseBudget
from .noise.ledger import ChargeOnFirstDraw, ReleaseLedger
from .noise.sampler import make_random_source
from .policy import ReleasePolicy, epsilon_shares, policy_to_dict, read_policy


class Progress:
    """Stage messages on stderr (silent when ``quiet``)."""

    def __init__(self, quiet: bool = False, stream=None):
        self.quiet = quiet
        self.stream = stream or sys.stderr
        self.t0 = time.perf_counter()

    def __call__(self, message: str) -> None:
        if not self.quiet:
            print(f"[{time.perf_counter() - self.t0:7.1f}s] {message}", file=self.stream, flush=True)


def _silent(message: str) -> None:
    pass


@dataclass
class Release:
    """A built release, before publication.

    ``tables`` and ``manifest`` are public. ``truth`` holds the true statistics
    for the auditor: confidential, never written into a bundle.
    """

    tables: dict
    manifest: dict
    grouping: Grouping
    network: Network
    policy: ReleasePolicy
    truth: dict = field(default_factory=dict)
    mechanisms: dict = field(default_factory=dict)
    audit: dict | None = None  # confidential audit figures (aggpub.audit), set by run_release
    report_path: Path | None = None  # where run_release wrote the confidential report

    @property
    def supernodes(self) -> pa.Table:
        return self.tables["supernodes"]

    @property
    def superedges(self) -> pa.Table | None:
        return self.tables.get("superedges")

    def datacard(self) -> str:
        return render_datacard(self.manifest)


def make_grouping(network: Network, policy: ReleasePolicy, budget: ReleaseBudget, source, epsilons) -> Grouping:
    """Run the policy's grouping method (the grouping stage)."""
    g = policy.grouping
    if g.method == "attributes":
        if policy.privacy.unit != "edge":
            return _group_by_attributes_noisy(network, policy, budget, source, epsilons["supernode_sizes"])
        return group_by_attributes(network.people, g.attributes, g.min_size, g.hierarchies, g.merge_order)
    if g.method in ("structure", "attributes+structure"):  # private: spends the grouping share (issue 5)
        from .grouping.structure import group_by_structure

        return group_by_structure(network, g.min_size, epsilons.get("grouping", 0.0), source, tiers=g.tiers,
                                  rounds=g.rounds, unit=policy.privacy.unit,
                                  attributes=g.attributes if g.method == "attributes+structure" else (),
                                  hierarchies=g.hierarchies, merge_order=g.merge_order)
    if g.method in ("given", "random") and policy.privacy.unit != "edge":
        raise PrivacyError(f"grouping method '{g.method}' is only available under privacy unit 'edge': under "
                           "'person' the supernode sizes of the map or partition are private")
    if g.method == "given":
        from .grouping.given import group_by_map, read_group_map

        if network.ids is None:
            raise PolicyError("'grouping.map': this engine does not keep person ids, so the map cannot be joined")
        return group_by_map(network.ids, read_group_map(g.map_path), g.min_size, name=str(g.map_path))
    if g.method == "random":
        from .grouping.random_groups import group_at_random

        return group_at_random(network.n_people, g.min_size, source)
    raise PolicyError(f"'grouping.method' = '{g.method}' is not available in this version")


#: Most fine attribute cells a public domain may have under unit ``person`` (every cell gets noise).
MAX_PUBLIC_CELLS = 1_000_000


def public_domain(people: pa.Table, policy: ReleasePolicy) -> list:
    """The public value domain of each grouping attribute: the first level of its hierarchy.

    Under unit ``person`` the set of values present in the data is itself private
    (one person can be the only one with a value), so the fine cells are the full
    product of declared domains, present in the data or not.

    Raises
    ------
    PolicyError
        An attribute has no declared hierarchy, or the data hold values outside it
        (only the count of such people is given).
    """
    g = policy.grouping
    domains = []
    for a in g.attributes:
        levels = g.hierarchies.get(a)
        if not levels:
            raise PolicyError(f"'grouping.hierarchies.{a}': under unit 'person' every grouping attribute needs "
                              "a declared hierarchy, whose first level lists every possible value (the values "
                              "present in the data are private); an identity level mapping each value to itself will do")
        domain = list(levels[0])
        inside = pc.is_in(people.column(a), value_set=pa.array(domain, type=pa.string()))
        outside = people.num_rows - int(pc.sum(inside).as_py() or 0)
        if outside:
            raise PolicyError(f"'grouping.hierarchies.{a}.levels[0]' does not list the value of attribute '{a}' "
                              f"of {outside:,} person(s); the first level must cover every possible value")
        domains.append(domain)
    n_cells = float(np.prod([float(len(d)) for d in domains]))
    if n_cells > MAX_PUBLIC_CELLS:
        raise PolicyError(f"'grouping.attributes': {n_cells:.0f} fine cells under unit 'person' (the product of the "
                          f"declared domains); at most {MAX_PUBLIC_CELLS:,} are supported")
    return domains


def _domain_rows(attributes, domains) -> pa.Table:
    """One row for every combination of domain values (the public fine cells)."""
    grids = np.meshgrid(*[np.arange(len(d)) for d in domains], indexing="ij")
    return pa.table({a: pa.array(np.asarray(d, dtype=object)[grid.reshape(-1)], type=pa.string())
                     for a, d, grid in zip(attributes, domains, grids)})


def _group_by_attributes_noisy(network: Network, policy: ReleasePolicy, budget: ReleaseBudget, source,
                               epsilon: float) -> Grouping:
    """Attribute grouping for unit ``person``: every size decision on noisy fine-cell counts.

    Every fine cell of the public domain (:func:`public_domain`) gets a noisy count
    (discrete Laplace, sensitivity 1, the ``supernode_sizes`` share); the grouping
    merges on those counts only, and the released sizes are sums of them
    (post-processing). One spend, ``supernode_sizes``, is recorded.
    """
    import dataclasses

    g = policy.grouping
    people = network.people.select(list(g.attributes))
    domains = public_domain(people, policy)
    # The public cells go first, so the cell order (first appearance) is the domain's, not the data's.
    domain_rows = _domain_rows(g.attributes, domains).cast(people.schema)
    padded = pa.concat_tables([domain_rows, people])
    planned = comp.Spend(name="supernode_sizes", epsilon=epsilon, sensitivity=1.0, mechanism="discrete_laplace",
                         scale=1.0 / epsilon)
    budget.check(planned)  # check before any noise is drawn
    spends = []

    def noisy_counts(padded_counts):
        # every public cell appears once among the padding rows: subtract it to get the true counts
        noisy, spend, _ = comp.release_cell_counts(np.asarray(padded_counts, dtype=np.int64) - 1, epsilon,
                                                   source)
        spends.append(spend)
        return noisy

    grouping = group_by_attributes(padded, g.attributes, g.min_size, g.hierarchies, g.merge_order,
                                   cell_counts=noisy_counts)
    return dataclasses.replace(grouping, assignment=grouping.assignment[domain_rows.num_rows:], spends=spends,
                               public=False)


def build_release(network: Network, policy: ReleasePolicy, *, seed: int | None = None, progress=None,
                  before_noise=None) -> Release:
    """Build a release from an ingested network (no file is written).

    Parameters
    ----------
    network : Network
        From :func:`aggpub.load_network`.
    policy : ReleasePolicy
    seed : int, optional
        For tests only: makes the noise reproducible and marks the release non-private.
    progress : callable, optional
        Called with a message at each stage.
    before_noise : callable, optional
        Called once, before the first random number is drawn (the lifetime
        ledger's charge); if it raises, no noise is drawn.

    Returns
    -------
    Release
    """
    progress = progress or _silent
    source = make_random_source(seed)
    if before_noise is not None:
        source = ChargeOnFirstDraw(source, before_noise)
    budget = ReleaseBudget(policy.privacy.epsilon)
    epsilons = epsilon_shares(policy)
    unit = policy.privacy.unit

    if unit == "person":  # the promise D is checked on the data (before any noise), never enforced by truncation
        comp.check_contact_cap(network.engine.degrees(network.n_people), policy.privacy.max_contacts)

    progress("grouping people into supernodes")
    grouping = make_grouping(network, policy, budget, source, epsilons)
    for spend in grouping.spends:
        budget.spend(spend)
    true_sizes = grouping.sizes()
    sizes_exact = grouping.noisy_cell_sizes is None
    # The sizes every later step uses (caps, histogram totals): public, or released (post-processing).
    sizes = comp.released_sizes(grouping)
    if sizes_exact and (sizes < policy.grouping.min_size).any():
        raise PrivacyError("internal check failed: a supernode is below min_size")  # pragma: no cover
    n_groups = grouping.n_supernodes
    progress(f"{n_groups:,} supernodes of {int(sizes.min()):,} to {int(sizes.max()):,} people"
             + ("" if sizes_exact else " (noisy sizes)"))

    supernodes = grouping.labels.add_column(1, "size", pa.array(sizes.astype(np.int64)))
    tables = {"supernodes": supernodes}
    truth = {"sizes": true_sizes}
    mechanisms = {}
    D = policy.privacy.max_contacts

    extra_manifest = {}
    cp = policy.components.superedge_counts
    if cp.enabled:
        progress("counting superedges")
        nz_a, nz_b, nz_c = network.engine.superedge_counts(grouping.assignment)
        sens = comp.sensitivity(unit, "superedge_counts", policy.privacy.max_contacts)
        eps = epsilons["superedge_counts"]
        threshold = comp.superedge_sparse_threshold(cp, n_groups, eps, sens)  # None: dense
        n_cells = n_groups * (n_groups + 1) // 2
        if threshold is None:
            st = comp.dense_truth(n_groups, nz_a, nz_b, nz_c)
        else:  # sparse release: never builds the dense table
            st = comp.SuperedgeTruth(a=nz_a, b=nz_b, count=nz_c, complete=False)
            extra_manifest.update(superedges_sparse=True, superedges_sparse_threshold=threshold,
                                  superedge_cells=n_cells)
        truth["superedges"] = st
        progress(f"adding noise to {n_cells:,} superedge cells (epsilon {eps:g}, sensitivity {sens:g})"
                 + ("" if threshold is None else f", sparse release keeping noisy counts >= {threshold}"))
        table, spend, mech = comp.release_superedge_counts(st, sizes, eps, sens, source,
                                                           sparse_threshold=threshold, n_groups=n_groups)
        budget.spend(spend)
        tables["superedges"] = table
        mechanisms["superedge_counts"] = mech
    hp = policy.components.degree_histograms
    if hp.enabled:
        progress("counting degree histograms")
        hist = network.engine.degree_histograms(grouping.assignment, n_groups, hp.max_degree)
        truth["degree_histograms"] = hist
        sens = comp.sensitivity(unit, "degree_histograms", D)
        eps = epsilons["degree_histograms"]
        progress(f"adding noise to {hist.size:,} degree-histogram bins (epsilon {eps:g}, sensitivity {sens:g})")
        table, spend, mech = comp.release_degree_histograms(hist, sizes, eps, sens, source,
                                                            max_possible_degree=D)
        budget.spend(spend)
        tables["degree_histograms"] = table
        mechanisms["degree_histograms"] = mech
    wp = policy.components.weight_totals
    if wp.enabled:
        if not network.weighted:
            raise PolicyError(f"'components.weight_totals.column' = '{wp.column}': the network was read "
                              "without a weight column")
        progress("summing clipped weights per superedge")
        nz_a, nz_b, nz_t = network.engine.weight_totals(grouping.assignment, wp.clip)
        wt = comp.dense_truth(n_groups, nz_a, nz_b, nz_t)
        truth["weight_totals"] = wt
        sens = comp.sensitivity(unit, "weight_totals", D, wp.clip)
        eps = epsilons["weight_totals"]
        progress(f"adding noise to {len(wt.count):,} weight totals (epsilon {eps:g}, sensitivity {sens:g})")
        table, spend, mech = comp.release_weight_totals(wt, sizes, wp.clip, eps, sens, source)
        budget.spend(spend)
        tables["weight_totals"] = table
        mechanisms["weight_totals"] = mech

    manifest = {
        "format": BUNDLE_FORMAT,
        "tool_version": __version__,
        "created_utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "title": policy.title,
        "policy": policy_to_dict(policy),
        "privacy_unit": unit,
        "max_contacts": policy.privacy.max_contacts,
        "epsilon_total": policy.privacy.epsilon,
        "epsilon_spent": budget.spent(),
        "delta": 0.0,
        "min_size": policy.grouping.min_size,
        "seeded": source.seeded,
        "randomness": source.description,
        "components": [s.as_dict() for s in budget.spends],
        "sizes_exact": bool(sizes_exact),
        "grouping_method": grouping.method,
        "grouping_attributes": list(policy.grouping.attributes),
        "grouping_public": grouping.public,
        "grouping_notes": list(grouping.notes),
        "rows": {name: t.num_rows for name, t in tables.items()},
        "cautions": CAUTIONS,
    }
    manifest.update(extra_manifest)
    if source.seeded:
        manifest["warning"] = "seeded: reproducible noise, NOT private; for tests only"
    return Release(tables=tables, manifest=manifest, grouping=grouping, network=network, policy=policy,
                   truth=truth, mechanisms=mechanisms)


def release_tables(edges: pa.Table, people: pa.Table, policy: ReleasePolicy | dict, *, seed=None,
                   source="source", target="target", node="node", weight=None, drop_unknown=False) -> Release:
    """Build a release in process from Arrow tables and a policy (no CLI, no files).

    Parameters
    ----------
    edges, people : pyarrow.Table
        Edge list and person attributes.
    policy : ReleasePolicy or dict
        A policy, or a decoded TOML mapping.
    seed : int, optional
        Tests only (non-private).

    Returns
    -------
    Release
    """
    from .policy import parse_policy

    if isinstance(policy, dict):
        policy = parse_policy(policy)
    network = load_network(edges, people, source=source, target=target, node=node,
                           weight=_weight_column(policy, weight),
                           drop_unknown=drop_unknown, attributes=_needed_attributes(policy))
    return build_release(network, policy, seed=seed)


def _weight_column(policy: ReleasePolicy, given=None):
    """The edge weight column to read: ``components.weight_totals.column`` when weight totals are on."""
    wt = policy.components.weight_totals
    if not wt.enabled:
        return given
    if given and given != wt.column:
        raise PolicyError(f"'components.weight_totals.column' = '{wt.column}' differs from the weight column "
                          f"given for input ('{given}'); name one column")
    return wt.column


def _needed_attributes(policy: ReleasePolicy):
    attrs = list(policy.grouping.attributes)
    gate_attr = policy.gate.contact_matrix_attribute
    if gate_attr and gate_attr not in attrs:
        attrs.append(gate_attr)
    return attrs


def publish(release: Release, out, *, overwrite: bool = False, _fault=None) -> Path:
    """Write a release as a bundle folder (atomic)."""
    return write_bundle(out, release.tables, release.manifest, release.datacard(), overwrite=overwrite,
                        _fault=_fault)


def run_release(policy, edges, people, out, *, seed=None, overwrite=False, source=None, target=None,
                node=None, weight=None, drop_unknown=None, engine="duckdb", progress=None, debug=False,
                memory_limit=None, report=None, monte_carlo=None):
    """The whole release from files: read, build, audit, gate, publish. Returns ``(release, bundle_path)``.

    The audit (:func:`aggpub.audit.audit_release`) compares the release with the
    true network; its confidential report goes to ``report`` (default: the
    sibling folder ``<out>.report``), written even when the gate refuses the
    release. A refused release writes no bundle and raises
    :class:`~aggpub.errors.GateError`; its budget stays charged (the noise was drawn).

    Column options left as ``None`` come from the policy's ``[input]`` section.
    ``memory_limit`` (e.g. ``"4GB"``) caps the counting engine's memory (default:
    from the machine); the engine spills beyond it into a private folder beside
    ``out``, removed afterwards.
    """
    from .audit.report import check_report_target, default_report_path
    from .bundle._files import prepare_target
    from .engines import make_engine
    from .errors import GateError

    progress = progress or _silent
    if not isinstance(policy, ReleasePolicy):
        policy = read_policy(policy)
    out = Path(out).absolute()
    prepare_target(out, overwrite)  # fail before the work, not after
    report_dir = Path(report).absolute() if report is not None else default_report_path(out)
    check_report_target(report_dir, overwrite, bundle=out)
    # Lifetime ledger: verified and checked now (read only), charged before the first noise draw.
    ledger = ReleaseLedger(policy, out) if policy.ledger is not None else None
    inp = policy.input
    progress("reading edges and people")
    network = load_network(edges, people, source=source or inp.source, target=target or inp.target,
                           node=node or inp.node, weight=_weight_column(policy, weight or inp.weight),
                           drop_unknown=inp.drop_unknown if drop_unknown is None else drop_unknown,
                           attributes=_needed_attributes(policy), debug=debug,
                           engine=make_engine(engine, memory_limit=memory_limit, spill_parent=out.parent,
                                              progress=progress))
    for line in network.report.lines():
        progress(line)
    try:
        release = build_release(network, policy, seed=seed, progress=progress,
                                before_noise=ledger.charge if ledger else None)
        if ledger is not None:
            charge = ledger.charge()  # no-op if already charged; the spend is committed before publishing
            release.manifest["ledger"] = charge.as_dict()
            progress(f"ledger: charged epsilon {charge.epsilon:g} to '{charge.dataset}', "
                     f"{charge.remaining:g} of {charge.lifetime_epsilon:g} left")
        from .audit import audit_release, gate_failure_message
        from .audit.report import write_report

        progress("auditing the release against the true network (confidential)")
        release.audit = audit_release(release, monte_carlo=monte_carlo, progress=progress)
        gate = release.audit["gate"]
        release.audit["outcome"] = ("refused by the gate: no bundle written" if not gate["passed"]
                                    else f"passed the gate; bundle to be written to {out}")
        progress("drawing the figures of the confidential report")
        release.report_path = write_report(report_dir, release.audit, overwrite=overwrite, bundle=out)
        progress(f"confidential report written to {release.report_path}")
        if not gate["passed"]:
            raise GateError(gate_failure_message(gate, epsilon=release.manifest.get("epsilon_spent"),
                                                 report_path=release.report_path / "report.html"))
        if gate["checked"]:
            progress(f"gate passed ({len(gate['checked'])} threshold(s))")
        progress(f"writing bundle {out}")
        path = publish(release, out, overwrite=overwrite)
    except BaseException:
        if ledger is not None:
            ledger.finish(ok=False)
        raise
    if ledger is not None:
        ledger.finish(ok=True)
    return release, path
