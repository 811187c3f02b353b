"""The release pipeline: the one place that wires the stages, in the order of the diagram.

::

    policy + inputs -> ingest -> grouping -> counting -> noise -> post-processing -> audit -> gate -> bundle

:func:`build_release` runs grouping to post-processing on an ingested network
(no file is touched); :func:`run_release` adds ingest, the lifetime ledger, the
confidential audit and report, the gate and the atomic bundle write.
"""

from __future__ import annotations

__all__ = ["Release", "ReleaseRun", "build_release", "release_tables", "run_release", "publish", "Progress",
           "preflight_gate", "release_gate", "applied_policy"]

from pathlib import Path

import numpy as np
import pyarrow as pa

from .audit.run import audit_and_report, report_folder
from .audit.sampled import discard_spare, start_spare, start_spare_for
from .budget import ReleaseBudget, check_contact_cap
from .budget.ledger import ChargeOnFirstDraw, ReleaseLedger
from .bundle.guide import render_guide
from .bundle.manifest import applied_policy, build_manifest
from .bundle.write import prepare_target, write_bundle
from .engines import make_engine
from .gate.run import enforce_gate, preflight_gate, release_gate
from .grouping import make_grouping
from .ingest import load_policy_inputs
from .network import Network
from .noise.sampler import make_random_source
from .policy import ReleasePolicy, epsilon_shares, parse_policy, read_policy
from .progress import Progress, silent
from .released import checked_sizes, release_statistics
from .results import Release, ReleaseRun  # re-exported: aggpub.pipeline.Release stays valid
from .warm import import_ahead


def build_release(network: Network, policy: ReleasePolicy, *, seed: int | None = None, progress=None,
                  ledger: ReleaseLedger | None = None, uncharged: str | None = None) -> Release:
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
    ledger : ReleaseLedger, optional
        Charged once, before the first random number is drawn; if the charge is
        refused, no noise is drawn. The charge is recorded in the manifest.
    uncharged : str, optional
        Why no ledger is charged (required when ``ledger`` is ``None``, so that every
        bundle says how it was accounted); recorded in the manifest's ``accounting``.

    Returns
    -------
    Release
    """
    progress = progress or silent
    source = make_random_source(seed)
    if ledger is not None:
        source = ChargeOnFirstDraw(source, ledger.charge)
    budget = ReleaseBudget(policy.privacy.epsilon)
    # the number of people is public under unit edge only (it decides whether an unset triangle_count is on)
    epsilons = epsilon_shares(policy, network.n_people if policy.privacy.unit == "edge" else None)
    if ledger is not None:  # the ledger records the split as released (charged at the first draw, below)
        ledger.components = epsilons
    # A refusal on a private condition (the promised cap or domains broken) is charged like a release.
    on_refusal = ledger.charge if ledger is not None else None
    if policy.privacy.unit == "person":  # the promise D is checked on the data, never enforced by truncation
        check_contact_cap(network.engine.degrees(network.n_people), policy.privacy.max_contacts, on_refusal)

    progress("grouping people into supernodes")
    grouping = make_grouping(network, policy, budget, source, epsilons, on_refusal=on_refusal)
    for spend in grouping.spends:
        budget.spend(spend)
    sizes, sizes_exact = checked_sizes(grouping, policy.grouping.min_size, progress)  # public, or released

    stats = release_statistics(network, grouping, policy, sizes, epsilons, source, progress, budget)
    tables = {"supernodes": grouping.labels.add_column(1, "size", pa.array(sizes.astype(np.int64))),
              **stats.tables}
    charge = ledger.charge() if ledger is not None else None  # no-op when the first draw charged it
    manifest = build_manifest(policy, grouping, budget, source, tables, sizes_exact=sizes_exact,
                              extra=stats.manifest, ledger_charge=charge,
                              uncharged=uncharged or "no lifetime ledger was given to the release")
    return Release(tables=tables, manifest=manifest, grouping=grouping, network=network, policy=policy,
                   truth={"sizes": grouping.sizes(), **stats.truth}, mechanisms=stats.mechanisms)


def release_tables(edges: pa.Table, people: pa.Table, policy: ReleasePolicy | dict, *, seed=None,
                   source="source", target="target", node="node", weight=None, drop_unknown=False,
                   charge_ledger: bool = True, new_dataset: bool = False) -> Release:
    """Build a release in process from Arrow tables and a policy (no CLI, no files).

    Parameters
    ----------
    edges, people : pyarrow.Table
        Edge list and person attributes.
    policy : ReleasePolicy or dict
        A policy, or a decoded TOML mapping.
    seed : int, optional
        Tests only (non-private).
    charge_ledger : bool, default True
        Charge the policy's ``[ledger]`` (as ``aggpub release`` does) before the first
        noise draw. ``False`` is an explicit choice not to: the manifest then says the
        release was not charged, and ``aggpub check`` prints it.
    new_dataset : bool, default False
        The people were charged before under another dataset id and this really is a
        new dataset about them (see :meth:`aggpub.budget.ledger.Ledger.charge`).

    Returns
    -------
    Release
        Its network's engine stays open with it (the audit reads the true network).

    Examples
    --------
    >>> import networkx as nx, pyarrow as pa
    >>> import aggpub
    >>> G = nx.karate_club_graph()  # Zachary's karate club, as networkx ships it
    >>> edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    >>> people = pa.table({"node": [str(n) for n in G], "club": [G.nodes[n]["club"] for n in G]})
    >>> policy = {"privacy": {"unit": "edge", "epsilon": 1.0},
    ...           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 5}}
    >>> release = aggpub.release_tables(edges, people, policy, seed=1)  # a seed: tests only, NOT private
    >>> release.supernodes.column("size").to_pylist()
    [17, 17]
    >>> release.superedges.num_rows  # every pair of supernodes, the diagonal included, zeros included
    3
    >>> release.manifest["epsilon_spent"] <= 1.0  # the components' spends add up to at most the total
    True
    """
    if isinstance(policy, dict):
        policy = parse_policy(policy)
    network = load_policy_inputs(policy, edges, people, source=source, target=target, node=node, weight=weight,
                                 drop_unknown=drop_unknown)
    ledger, why = None, "the policy has no [ledger] section"
    if policy.ledger is not None:
        if charge_ledger:
            ledger = ReleaseLedger(policy, "(in-process release)", new_dataset=new_dataset)
            ledger.attach_input(network.ids)
        else:
            why = "the caller chose not to charge the policy's ledger (charge_ledger=False)"
    release = build_release(network, policy, seed=seed, ledger=ledger, uncharged=why)
    if ledger is not None:
        ledger.finish(ok=True)  # charged: the noisy tables exist, whatever happens to them next
    return release


def publish(release: Release, out, *, overwrite: bool = False, _fault=None) -> Path:
    """Write a release as a bundle folder (atomic).

    Examples
    --------
    >>> import networkx as nx, pyarrow as pa
    >>> import aggpub
    >>> G = nx.karate_club_graph()  # Zachary's karate club, as networkx ships it
    >>> edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    >>> people = pa.table({"node": [str(n) for n in G], "club": [G.nodes[n]["club"] for n in G]})
    >>> policy = {"privacy": {"unit": "edge", "epsilon": 1.0},
    ...           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 5}}
    >>> import pathlib, tempfile
    >>> release = aggpub.release_tables(edges, people, policy, seed=1)
    >>> path = aggpub.publish(release, pathlib.Path(tempfile.mkdtemp()) / "karate-bundle")
    >>> aggpub.check_bundle(path).ok
    True
    >>> {"README.md", "manifest.json", "supernodes.parquet", "superedges.parquet"} <= {p.name for p in path.iterdir()}
    True
    """
    return write_bundle(out, release.tables, release.manifest, render_guide(release.manifest),
                        overwrite=overwrite, _fault=_fault)


def run_release(policy, edges, people, out, *, seed=None, overwrite=False, source=None, target=None,
                node=None, weight=None, drop_unknown=None, engine="duckdb", progress=None, debug=False,
                memory_limit=None, report=None, monte_carlo=None, new_dataset=False) -> ReleaseRun:
    """The whole release from files: read, build, audit, gate, publish.

    The audit (:func:`aggpub.audit.audit_release`) compares the release with the
    true network; its confidential report goes to ``report`` (default: the
    sibling folder ``<out>.report``), written even when the gate refuses the
    release. A refused release writes no bundle and raises
    :class:`~aggpub.errors.GateError`; its budget stays charged (the noise was drawn).

    Column options left as ``None`` come from the policy's ``[input]`` section.
    ``memory_limit`` (e.g. ``"4GB"``) caps the counting engine's memory (default:
    from the machine); the engine spills beyond it into a private folder beside
    ``out``, removed when the engine is closed here, whatever the outcome.

    Returns
    -------
    ReleaseRun
    """
    progress = progress or silent
    if not isinstance(policy, ReleasePolicy):
        policy = read_policy(policy)
    out = Path(out).absolute()
    prepare_target(out, overwrite)  # fail before the work, not after
    report_dir = report_folder(out, report, overwrite)
    # Lifetime ledger: verified and checked now (read only), charged before the first noise draw.
    ledger = ReleaseLedger(policy, out, new_dataset=new_dataset) if policy.ledger is not None else None
    progress("reading edges and people")
    eng = make_engine(engine, memory_limit=memory_limit, spill_parent=out.parent, progress=progress)
    try:
        start_spare_for(edges)  # from an estimate of the contacts; kept or ended once they are counted (start_spare)
        policy = applied_policy(policy, source=source, target=target, node=node, weight=weight,
                                drop_unknown=drop_unknown)  # the manifest records what was applied
        ahead = import_ahead()  # what the rest of the release needs, imported while the engine reads
        network = load_policy_inputs(policy, edges, people, debug=debug, engine=eng,
                                     on_refusal=ledger.charge if ledger is not None else None)
        ahead.wait()
        for line in network.report.lines(private_counts=policy.privacy.unit != "person"):
            progress(line)
        start_spare(network.n_edges)  # the audit's helper interpreter starts up while the release is built
        preflight = preflight_gate(policy, network, progress)
        if ledger is not None:
            ledger.attach_input(network.ids)  # the people's keyed fingerprint, kept in the ledger only
        release = build_release(network, policy, seed=seed, progress=progress, ledger=ledger,
                                uncharged="the policy has no [ledger] section")
        if ledger is not None:
            charge = ledger.charged
            progress(f"ledger: charged epsilon {charge.epsilon:g} to '{charge.dataset}', "
                     f"{charge.remaining:g} of {charge.lifetime_epsilon:g} left")
        gate = release_gate(release)
        findings, report_path = audit_and_report(release, gate=gate, preflight=preflight, out=out,
                                                 report_dir=report_dir, overwrite=overwrite,
                                                 monte_carlo=monte_carlo, progress=progress)
        enforce_gate(gate, release, report_path, progress)
        progress(f"writing bundle {out}")
        path = publish(release, out, overwrite=overwrite)
    except BaseException:
        if ledger is not None:
            ledger.finish(ok=False)
        raise
    finally:
        discard_spare()
        eng.close()  # frees the engine's memory and removes its spill folder
    if ledger is not None:
        ledger.finish(ok=True)
    return ReleaseRun(release, path, findings, report_path)
