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
            raise PrivacyError("grouping by attributes under unit 'person' needs noisy cell sizes; "
                               "not available in this version")
        return group_by_attributes(network.people, g.attributes, g.min_size, g.hierarchies, g.merge_order)
    raise PolicyError(f"'grouping.method' = '{g.method}' is not available in this version")


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

    progress("grouping people into supernodes")
    grouping = make_grouping(network, policy, budget, source, epsilons)
    for spend in grouping.spends:
        budget.spend(spend)
    sizes = grouping.sizes()
    if (sizes < policy.grouping.min_size).any():
        raise PrivacyError("internal check failed: a supernode is below min_size")  # pragma: no cover
    n_groups = grouping.n_supernodes
    progress(f"{n_groups:,} supernodes of {int(sizes.min()):,} to {int(sizes.max()):,} people")

    supernodes = grouping.labels.add_column(1, "size", pa.array(sizes.astype(np.int64)))
    tables = {"supernodes": supernodes}
    truth = {"sizes": sizes}
    mechanisms = {}

    cp = policy.components.superedge_counts
    if cp.enabled:
        progress("counting superedges")
        nz_a, nz_b, nz_c = network.engine.superedge_counts(grouping.assignment)
        st = comp.dense_truth(n_groups, nz_a, nz_b, nz_c)
        truth["superedges"] = st
        sens = comp.sensitivity(unit, "superedge_counts", policy.privacy.max_contacts)
        eps = epsilons["superedge_counts"]
        progress(f"adding noise to {len(st.count):,} superedge cells (epsilon {eps:g}, sensitivity {sens:g})")
        table, spend, mech = comp.release_superedge_counts(st, sizes, eps, sens, source)
        budget.spend(spend)
        tables["superedges"] = table
        mechanisms["superedge_counts"] = mech
    for other in ("degree_histograms", "weight_totals"):
        if getattr(policy.components, other).enabled:
            raise PolicyError(f"'components.{other}' is not available in this version")

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
        "sizes_exact": not comp.SENSITIVITY[(unit, "supernode_sizes")],
        "grouping_method": grouping.method,
        "grouping_attributes": list(policy.grouping.attributes),
        "grouping_public": grouping.public,
        "rows": {name: t.num_rows for name, t in tables.items()},
        "cautions": CAUTIONS,
    }
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
    network = load_network(edges, people, source=source, target=target, node=node, weight=weight,
                           drop_unknown=drop_unknown, attributes=_needed_attributes(policy))
    return build_release(network, policy, seed=seed)


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
                node=None, weight=None, drop_unknown=None, engine="duckdb", progress=None, debug=False):
    """The whole release from files: read, build, publish. Returns ``(release, bundle_path)``.

    Column options left as ``None`` come from the policy's ``[input]`` section.
    """
    from .bundle._files import prepare_target
    from .engines import make_engine

    progress = progress or _silent
    if not isinstance(policy, ReleasePolicy):
        policy = read_policy(policy)
    out = Path(out).absolute()
    prepare_target(out, overwrite)  # fail before the work, not after
    # Lifetime ledger: verified and checked now (read only), charged before the first noise draw.
    ledger = ReleaseLedger(policy, out) if policy.ledger is not None else None
    inp = policy.input
    progress("reading edges and people")
    network = load_network(edges, people, source=source or inp.source, target=target or inp.target,
                           node=node or inp.node, weight=weight or inp.weight,
                           drop_unknown=inp.drop_unknown if drop_unknown is None else drop_unknown,
                           attributes=_needed_attributes(policy), engine=make_engine(engine), debug=debug)
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
        progress(f"writing bundle {out}")
        path = publish(release, out, overwrite=overwrite)
    except BaseException:
        if ledger is not None:
            ledger.finish(ok=False)
        raise
    if ledger is not None:
        ledger.finish(ok=True)
    return release, path
