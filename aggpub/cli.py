"""Command line: parses arguments, calls the library, prints results. No logic beyond that.

Exit codes: 0 success, 1 check failed, 2 usage, 3 input, 4 policy, 5 privacy or
budget, 6 gate failed, 7 output, 8 bundle, 9 internal (see ``aggpub.errors``).
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from pathlib import Path

from ._version import __version__
from .errors import AggpubError, UsageError

EXIT_CODES_HELP = """exit codes:
  0 success          1 check found problems   2 usage error      3 input error
  4 policy error     5 privacy/budget error   6 gate failed      7 output error
  8 bundle error     9 internal error         130 interrupted (nothing published)

environment (a value you set is kept):
  AGGPUB_HUGE_PAGES=keep      keep the kernel's transparent huge pages (switched off by default:
                              faster on virtual machines)
  ARROW_DEFAULT_MEMORY_POOL   Arrow's allocator (default here: system)
  MALLOC_TRIM_THRESHOLD_,     the C library's allocator (default here: freed memory kept for reuse;
  MALLOC_MMAP_THRESHOLD_      any MALLOC_* or GLIBC_TUNABLES you set leaves it as it is)
  OPENBLAS_NUM_THREADS        threads of the BLAS library (default here: 1)
"""


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        raise UsageError(f"{self.prog}: {message}")


def _add_input_options(p):
    p.add_argument("--policy", required=True, type=Path, help="release policy (TOML)")
    p.add_argument("--edges", required=True, type=Path, help="edge list: CSV, TSV or Parquet")
    p.add_argument("--nodes", required=True, type=Path, help="person attributes: CSV or Parquet")
    p.add_argument("--source-column", help="edge column of the first person (default: policy or 'source')")
    p.add_argument("--target-column", help="edge column of the second person (default: policy or 'target')")
    p.add_argument("--node-column", help="person id column (default: policy or 'node')")
    p.add_argument("--weight-column", help="edge weight column (default: policy, or none)")
    p.add_argument("--drop-unknown", action="store_true", default=None,
                   help="drop edges naming people missing from the person table (default: fail)")
    p.add_argument("--engine", default="duckdb", choices=("duckdb", "spark"), help="counting engine")
    p.add_argument("--memory-limit", metavar="SIZE",
                   help="memory cap of the counting engine, e.g. 4GB (default: a tenth of the machine, 256MB to 8GB; "
                        "more is faster on very large inputs); "
                        "beyond it the engine spills to a temporary folder beside --out")


def _add_common(p):
    p.add_argument("--quiet", action="store_true", help="no progress messages")
    p.add_argument("--debug", action="store_true",
                   help="show tracebacks and private values in error messages (never in production logs)")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="aggpub", description="Publish privacy-protected aggregated contact networks: "
                     "supernodes of at least k people, noisy superedge counts under a stated epsilon, "
                     "in a verifiable Parquet bundle.", epilog=EXIT_CODES_HELP,
                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"aggpub {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for add in (_add_release_parser, _add_check_parser, _add_demo_parser, _add_ledger_parser, _add_sample_parser,
                _add_plan_parser, _add_sweep_parser, _add_draft_policy_parser, _add_matrix_parser):
        add(sub)
    return parser


def _subcommand(sub, name: str, summary: str, description: str):
    """A subcommand's parser (``summary`` in the list of commands), with the exit codes in its help."""
    return sub.add_parser(name, help=summary, description=description, epilog=EXIT_CODES_HELP,
                          formatter_class=argparse.RawDescriptionHelpFormatter)


def _add_out_option(p, what: str) -> None:
    p.add_argument("--out", required=True, type=Path, help=what)


def _add_test_seed_option(p) -> None:
    p.add_argument("--seed", type=int, help="TESTS ONLY: fixed noise seed; the bundle is marked non-private")


def _add_report_option(p) -> None:
    p.add_argument("--report", type=Path, metavar="DIR",
                   help="folder for the CONFIDENTIAL audit report (report.html, audit.json; true statistics, never for researchers); default: <out>.report beside the bundle")


def _add_release_parser(sub):
    p = _subcommand(sub, "release", "build a release bundle from an edge list, people and a policy",
                    "Build a privacy-protected release bundle.")
    _add_input_options(p)
    _add_out_option(p, "bundle folder to create")
    p.add_argument("--overwrite", action="store_true", help="replace an existing bundle at --out")
    _add_test_seed_option(p)
    p.add_argument("--new-dataset", action="store_true",
                   help="these people were charged before under another [ledger] dataset id, and this really is "
                        "a new dataset about them (e.g. a new survey wave); renaming a dataset does not reset "
                        "its budget")
    _add_report_option(p)
    p.add_argument("--layer-column", metavar="NAME",
                   help="edge column holding each contact's layer (setting); its values are declared in the "
                        "policy's [layers] values (default: the policy's layers.column)")
    p.add_argument("--audit-draws", type=int, default=None, metavar="N",
                   help="fresh noise draws of the audit's Monte Carlo error spread (default: 20 on tables up to "
                        "300,000 cells, fewer above, at least 3; 0 skips the spread)")
    _add_common(p)


def _add_check_parser(sub):
    p = _subcommand(sub, "check", "verify a bundle (checksums, schema, metadata, invariants)",
                    "Verify a release bundle; exit 1 naming every problem found.")
    p.add_argument("bundle", type=Path, help="bundle folder")
    _add_common(p)


def _add_demo_parser(sub):
    p = _subcommand(sub, "demo", "build the invented demo town and release it",
                    "Generate the invented town of Quennet Vale (about 30,000 residents), "
                    "write its people, contacts and an example policy, and release it.")
    _add_out_option(p, "bundle folder to create")
    p.add_argument("--data", type=Path, help="folder for the generated inputs (default: <out>-inputs)")
    p.add_argument("--people", type=int, default=30_000, help="number of residents (default 30000)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing bundle at --out")
    _add_test_seed_option(p)
    _add_report_option(p)
    _add_common(p)


def _add_ledger_parser(sub):
    p = _subcommand(sub, "ledger", "list the spends of a lifetime ledger and the budget left",
                    "Verify a lifetime ledger (integrity and hash chain) and list every spend "
                    "with the epsilon left per dataset. Read only.")
    p.add_argument("file", type=Path, help="ledger file (SQLite)")
    p.add_argument("--dataset", help="only this dataset id")
    _add_common(p)


def _add_sample_parser(sub):
    p = _subcommand(sub, "sample", "draw a synthetic network consistent with a bundle (researcher view)",
                    "Verify a bundle, then draw a synthetic contact network in which every "
                    "superedge cell holds exactly its estimated number of distinct contacts. With the "
                    "released degree sequences, people get their supernode's estimated degrees (a "
                    "degree-corrected block model) and, with the released triangle count, clustering "
                    "fitted to it; otherwise contacts are placed uniformly among the cell's possible "
                    "pairs. The people are invented and numbered per supernode. Post-processing of "
                    "public data: costs no privacy budget.")
    p.add_argument("bundle", type=Path, help="bundle folder")
    _add_out_option(p, "Parquet file to write (columns source, target)")
    p.add_argument("--people", type=Path, help="also write the person -> supernode table (Parquet)")
    p.add_argument("--seed", type=int, help="fixed seed for the sampling (reproducible; costs no privacy)")
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")
    _add_common(p)


def _add_plan_parser(sub):
    p = _subcommand(sub, "plan", "free pre-flight: the supernodes, the noise and the gate, before any noise",
                    "Predict what a release would form and how its gate is expected to judge it, "
                    "for the policy's setting or a grid of epsilon x min_size. Draws no noise, charges "
                    "nothing, writes nothing, and reads nothing private: under unit 'edge' the person file "
                    "(public there), under unit 'person' only the policy and its [assumptions]. The contacts "
                    "are never read. Exit 6 when no setting is expected to pass the gate.")
    p.add_argument("--policy", required=True, type=Path, help="release policy (TOML)")
    p.add_argument("--nodes", type=Path, help="person attributes (unit 'edge' only: public there)")
    p.add_argument("--edges", type=Path, help="accepted for symmetry with 'release' and never read")
    p.add_argument("--node-column", help="person id column (default: policy or 'node')")
    p.add_argument("--epsilons", help="comma-separated total epsilons to try (default: the policy's)")
    p.add_argument("--min-sizes", help="comma-separated minimum supernode sizes to try (default: the policy's)")
    p.add_argument("--json", action="store_true", help="print the plan as JSON instead of a table")
    _add_common(p)


def _add_sweep_parser(sub):
    p = _subcommand(sub, "sweep", "INTERNAL planning aid: errors over a grid of epsilon x min_size",
                    "Internal planning aid (confidential, writes nothing public): expected and "
                    "observed errors of a release over a grid of epsilon x min_size (x privacy unit), the "
                    "true statistics computed once per grouping, and the cheapest setting meeting the "
                    "policy's [gate]. Choosing parameters from the private data is itself a data-dependent "
                    "step outside the guarantee (use 'aggpub plan', which reads nothing private, to choose), "
                    "and the final release draws fresh noise.")
    _add_input_options(p)
    p.add_argument("--epsilons", required=True, help="comma-separated total epsilons, e.g. 0.5,1,2")
    p.add_argument("--min-sizes", required=True, help="comma-separated minimum supernode sizes, e.g. 10,20")
    p.add_argument("--units", help="comma-separated privacy units to try (default: the policy's)")
    p.add_argument("--max-contacts", type=int, help="contact cap for unit 'person' (default: the policy's)")
    p.add_argument("--draws", type=int, default=3, help="real noise draws per grid point (default 3)")
    _add_out_option(p, "folder for sweep.csv, plots and README.txt")
    p.add_argument("--overwrite", action="store_true", help="replace an existing sweep folder at --out")
    p.add_argument("--seed", type=int, help="fixed seed of the planning draws")
    _add_common(p)


def _add_draft_policy_parser(sub):
    p = _subcommand(sub, "draft-policy", "write a commented starting policy for a person file and attributes",
                    "Write a starting release policy in which every key is commented with what it "
                    "does and the choices: epsilon 1.0, min_size 20, grouping by the given attributes, a "
                    "[ledger] section commented out, no [gate] thresholds. Under --unit edge the person table "
                    "is public, so each attribute's values are read from it and listed, each mapped to itself, "
                    "for you to map to broader groups. Under --unit person the values in the person file are "
                    "private: only its header is read, and the attribute domains come from a public codebook "
                    "(--codebook, a CSV file attribute,value[,broader[,broader_2...]]; see docs/policy.md).")
    p.add_argument("--nodes", required=True, type=Path, help="person file: CSV, TSV or Parquet")
    p.add_argument("--attributes", required=True, metavar="A,B",
                   help="comma-separated grouping attributes (columns of the person file)")
    p.add_argument("--unit", default="edge", choices=("edge", "person"), help="privacy unit (default edge)")
    p.add_argument("--codebook", type=Path, metavar="FILE",
                   help="public codebook of attribute values (CSV: attribute,value[,broader...]); "
                        "required with --unit person")
    p.add_argument("--max-contacts", type=int, metavar="N",
                   help="promised cap on contacts per person; required with --unit person")
    p.add_argument("--node-column", default="node", help="person id column (default 'node')")
    p.add_argument("--edges", type=Path, metavar="FILE",
                   help="edge file: only its header is read (column names are not private), to name the "
                        "edge id columns in [input]")
    p.add_argument("--epsilon", type=float, default=1.0, help="total epsilon to write (default 1.0)")
    p.add_argument("--min-size", type=int, default=20, help="smallest supernode to write (default 20)")
    _add_out_option(p, "policy file to write (TOML)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing file at --out")
    _add_common(p)


def _add_matrix_parser(sub):
    """``aggpub matrix`` (issue 13): the contact matrix of a released view, with intervals."""
    p = _subcommand(sub, "matrix", "contact matrix of a bundle's view, with intervals (researcher view)",
                    "Verify a bundle, then write the contact matrix of one released view: one row "
                    "per pair of values with the estimated contacts (unbiased), a confidence interval, and "
                    "with --per-person the people of each value and the contacts per person of each side. The "
                    "estimate combines every released table by least squares (the most precise consistent "
                    "estimate). Post-processing of public data: costs no privacy budget.")
    p.add_argument("bundle", type=Path, help="bundle folder")
    p.add_argument("--by", required=True, metavar="ATTR",
                   help="the view: an attribute, or attributes joined by commas as the policy named them")
    p.add_argument("--layer", metavar="NAME", help="one layer (setting); default: all layers together")
    p.add_argument("--per-person", action="store_true", help="add people per value and contacts per person")
    p.add_argument("--weight", action="store_true", help="totals of clipped weights (e.g. minutes) instead of counts")
    p.add_argument("--confidence", type=float, default=0.95, help="level of the intervals (default 0.95)")
    p.add_argument("--method", default="consistent", choices=("consistent", "view"),
                   help="least squares over every released table (default), or the raw view alone")
    p.add_argument("--draws", type=int, default=2000, help="Monte Carlo draws of the noise law (default 2000)")
    p.add_argument("--seed", type=int, help="seed of the Monte Carlo draws (reproducible; costs no privacy)")
    _add_out_option(p, "CSV file to write")
    p.add_argument("--plot", type=Path, metavar="FILE.png", help="also draw the matrix as a heat map (PNG)")
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")
    _add_common(p)


def _print_release(run):
    path = run.path
    m = run.release.manifest
    print(f"released {m['rows']['supernodes']:,} supernodes and "
          f"{m['rows'].get('superedges', 0):,} superedge cells to {path}")
    print(f"privacy unit {m['privacy_unit']}, epsilon {m['epsilon_total']:g}, min_size {m['min_size']}")
    for c in m["components"]:
        print(f"  {c['name']}: epsilon {c['epsilon']:.4g}, sensitivity {c['sensitivity']:g}, "
              f"{c['mechanism']} scale {c['scale']:.4g}")
    if m.get("seeded"):
        print("WARNING: seeded release, NOT private (tests only)")
    _print_audit(run.audit, run.report_path)


def _print_audit(audit, report_path):
    if not audit:
        return
    dd, gate = audit.get("degree_distribution", {}), audit.get("gate", {})
    if gate.get("checked"):
        checks = ", ".join(f"{k} {gate[k]['value']:.4g} <= {gate[k]['allowed']:g}" for k in gate["checked"])
        print(f"gate passed on the released values: {checks}")
    if "ks" in dd:
        seq = dd.get("from_degree_sequences") or {}
        if "ks" in seq:  # both: the block model of the superedge counts can be far off where the sequences are not
            print(f"CONFIDENTIAL (true against released): degree distribution from the superedge counts KS "
                  f"{dd['ks']:.4f}, Wasserstein-1 {dd['wasserstein1']:.4f}; from the released degree sequences KS "
                  f"{seq['ks']:.4f}, Wasserstein-1 {seq['wasserstein1']:.4f}")
        else:
            print(f"CONFIDENTIAL (true against released): degree distribution KS {dd['ks']:.4f}, "
                  f"Wasserstein-1 {dd['wasserstein1']:.4f}")
    print(f"CONFIDENTIAL audit report (board only, not for researchers): {report_path}")


def _non_negative(value, option):
    if value < 0:
        raise UsageError(f"aggpub release: {option} must be >= 0, got {value}")
    return value


def cmd_release(args):
    from .audit.sampled import start_spare_for

    start_spare_for(args.edges)  # the audit's helper starts up beside this process's imports and reading
    from .bundle.write import check_outside_inputs
    from .pipeline import run_release
    from .progress import Progress

    inputs = (args.edges, args.nodes, args.policy)
    check_outside_inputs(args.out, inputs, "bundle")  # an output folder never swallows an input
    if args.report is not None:
        check_outside_inputs(args.report, inputs, "report")
    policy = args.policy
    if args.layer_column:  # issue 13: the column from the command line, the declared values from the policy
        import dataclasses

        from .policy import read_policy

        policy = read_policy(args.policy)
        if not policy.layers.values:
            raise UsageError("'--layer-column' needs the layers declared in the policy ([layers] values)")
        policy = policy.replace(layers=dataclasses.replace(policy.layers, column=args.layer_column))
    run = run_release(policy, args.edges, args.nodes, args.out, seed=args.seed,
                      overwrite=args.overwrite, source=args.source_column, target=args.target_column,
                      node=args.node_column, weight=args.weight_column, drop_unknown=args.drop_unknown,
                      engine=args.engine, progress=Progress(args.quiet), debug=args.debug,
                      memory_limit=args.memory_limit, report=args.report,
                      monte_carlo=None if args.audit_draws is None
                      else _non_negative(args.audit_draws, "--audit-draws"), new_dataset=args.new_dataset)
    _print_release(run)
    if run.release.network.engine.name == "duckdb":  # run_release closed the engine and its spill folder
        _FINISHED_CLEANLY.append("release")
    return 0


def cmd_check(args):
    from .bundle import check_bundle

    res = check_bundle(args.bundle)
    for w in res.warnings:
        print(f"warning: {w}", file=sys.stderr)
    print(f"bundle {args.bundle}")
    for c in res.checked:
        print(f"  holds: {c}")
    for p in res.problems:
        print(f"  does not hold: {p}")
    if not res.ok:
        print(f"{args.bundle}: check failed ({len(res.problems)} problem(s))")
        return 1
    print(f"{args.bundle}: bundle verified ({len(res.checked)} statements hold)")
    return 0


def cmd_demo(args):
    from .demo import write_demo_inputs
    from .pipeline import run_release
    from .progress import Progress

    out = args.out.absolute()
    data = (args.data or out.parent / f"{out.name}-inputs").absolute()
    progress = Progress(args.quiet)
    progress(f"generating the invented town ({args.people:,} residents) into {data}")
    paths = write_demo_inputs(data, n_people=args.people)
    print(f"demo inputs (invented town): {paths['people']}, {paths['edges']}, {paths['policy']}")
    run = run_release(paths["policy"], paths["edges"], paths["people"], out, seed=args.seed,
                      overwrite=args.overwrite, progress=progress, debug=args.debug, report=args.report)
    _print_release(run)
    print(f"verify it with:  aggpub check {run.path}")
    print(f"release again:   aggpub release --policy {paths['policy']} --edges {paths['edges']} "
          f"--nodes {paths['people']} --out OTHER_FOLDER")
    return 0


def cmd_ledger(args):
    from .budget.ledger import Ledger

    ledger = Ledger(args.file, create=False)
    spends = ledger.spends(args.dataset)
    totals = ledger.datasets()
    if args.dataset is not None and args.dataset not in totals:
        print(f"{args.file}: no spends for dataset '{args.dataset}'")
        return 0
    # unit: the policy's privacy unit; new: declared a new dataset about people charged under another id
    # ('-': a row written by ledger schema version 1, which recorded neither). The input fingerprint is
    # never shown.
    print(f"{'id':>4}  {'time (UTC)':<20} {'dataset':<24} {'epsilon':>9}  {'unit':<6} {'new':<3}  {'status':<9} "
          "bundle")
    for s in spends:
        unit = s.privacy_unit if s.row_version >= 2 and s.privacy_unit else "-"
        new = ("yes" if s.declared_new else "no") if s.row_version >= 2 else "-"
        print(f"{s.id:>4}  {s.created_utc[:19]:<20} {s.dataset:<24} {s.epsilon:>9.4g}  {unit:<6} {new:<3}  "
              f"{s.status:<9} {s.bundle_path}")
    for name, (spent, cap) in sorted(totals.items()):
        if args.dataset is None or name == args.dataset:
            print(f"dataset '{name}': spent {spent:.6g} of lifetime epsilon {cap:.6g}, "
                  f"{max(0.0, cap - spent):.6g} left")
    if any(s.row_version < 2 for s in spends):
        print("'-' in unit and new: written by ledger schema version 1, which recorded neither")
    if ledger.schema_version == "1":
        print(f"{args.file}: ledger schema version 1; upgraded in place to version 2 (privacy unit, input "
              "fingerprint, declared new dataset) by the next charge")
    print(f"{args.file}: ledger verified ({len(ledger.spends())} spend(s), hash chain intact)")
    return 0


def cmd_sample(args):
    from .bundle import check_bundle, read_bundle
    from .errors import BundleError
    from .progress import Progress
    from .synthesis import sample_network, synthetic_people, write_sample

    progress = Progress(args.quiet)
    progress(f"checking bundle {args.bundle}")
    res = check_bundle(args.bundle)
    if not res.ok:
        raise BundleError(f"{args.bundle}: bundle check failed ({len(res.problems)} problem(s), first: "
                          f"{res.problems[0]}); run 'aggpub check' for the list")
    for w in res.warnings:
        print(f"warning: {w}", file=sys.stderr)
    for path in (args.out, args.people):
        if path is not None and path.exists() and not args.overwrite:
            from .errors import OutputError
            raise OutputError(f"{path}: output file already exists (use --overwrite to replace it)")
    bundle = read_bundle(args.bundle)
    progress("sampling the synthetic network")
    table = sample_network(bundle, seed=args.seed)
    out = write_sample(table, args.out, overwrite=args.overwrite)
    print(f"wrote {table.num_rows:,} synthetic contacts among {int(bundle.supernodes.column('size').to_numpy().sum()):,} "
          f"invented people to {out}")
    if args.people is not None:
        people = write_sample(synthetic_people(bundle), args.people, overwrite=args.overwrite)
        print(f"wrote the person -> supernode table to {people}")
    return 0


def cmd_plan(args):
    import json

    from .sweep import parse_grid
    from .plan import run_plan
    from .progress import Progress

    epsilons = parse_grid(args.epsilons, float, "--epsilons") if args.epsilons else None
    min_sizes = parse_grid(args.min_sizes, int, "--min-sizes") if args.min_sizes else None
    result = run_plan(args.policy, args.nodes, epsilons=epsilons, min_sizes=min_sizes, node=args.node_column,
                      progress=Progress(args.quiet), debug=args.debug)
    if args.json:
        print(json.dumps(result.as_dict(), indent=1, default=str))
    else:
        _print_plan(result)
    return 0 if result.any_expected_to_pass else 6


def _print_plan(result):
    print(f"pre-flight plan (unit {result.unit}): no noise drawn, nothing charged, nothing private read")
    keys = [k for k in result.rows[0].gate["checked"]] if result.rows else []
    head = f"{'epsilon':>8} {'min_size':>8} {'supernodes':>10} {'sizes':>13}  " + \
        "".join(f"{_short(k):>12}" for k in keys) + "  gate"
    print(head)
    for r in result.rows:
        sn = r.supernodes
        sizes = f"{sn['size_min']}-{sn['size_max']}" if sn.get("count") else "-"
        count = "private" if sn.get("count") is None and "error" not in sn else f"{sn.get('count') or 0:,}"
        figs = "".join(f"{_fmt_metric(r.gate[k]):>12}" for k in keys)
        print(f"{r.epsilon:>8g} {r.min_size:>8} {count:>10} {sizes:>13}  {figs}  {r.verdict}")
    if result.rows:
        print("noise per component at the first setting:")
        for c in result.rows[0].noise:
            print(f"  {c['name']}: scale {c['scale']:.4g} (sensitivity {c['sensitivity']:g}, "
                  f"epsilon {c['epsilon']:.4g})")
    for k in keys:
        print(f"  {_short(k)} = {k} <= {result.rows[0].gate[k]['allowed']:g}")
    for n in result.notes:
        print(f"note: {n}")


def _short(key):
    return {"max_degree_ks": "degree KS", "max_degree_wasserstein": "degree W1",
            "max_contact_matrix_median_relative_error": "matrix err", "max_superedge_median_relative_error":
            "cell err"}.get(key, key)


def _fmt_metric(entry):
    return "n/p" if entry.get("value") is None else f"{entry['value']:.3g}"


def cmd_sweep(args):
    from .progress import Progress
    from .sweep import PLANNING_NOTE, parse_grid, run_sweep, write_sweep

    epsilons = parse_grid(args.epsilons, float, "--epsilons")
    min_sizes = parse_grid(args.min_sizes, int, "--min-sizes")
    units = parse_grid(args.units, str, "--units") if args.units else None
    if args.draws < 1:
        raise UsageError(f"'--draws' must be >= 1, got {args.draws}")
    out = args.out.absolute()
    if out.exists() and not args.overwrite:
        from .errors import OutputError
        raise OutputError(f"{out}: output folder already exists (use --overwrite to replace it)")
    if args.weight_column:
        raise UsageError("'--weight-column': the sweep does not cover weight totals")
    print(PLANNING_NOTE)
    result = run_sweep(args.policy, args.edges, args.nodes, epsilons=epsilons, min_sizes=min_sizes, units=units,
                       max_contacts=args.max_contacts, draws=args.draws, seed=args.seed,
                       progress=Progress(args.quiet), engine=args.engine, source_column=args.source_column,
                       target_column=args.target_column, node_column=args.node_column,
                       drop_unknown=args.drop_unknown, memory_limit=args.memory_limit, debug=args.debug)
    path = write_sweep(result, out, overwrite=args.overwrite)
    print(f"{'unit':<7}{'min_size':>9}{'epsilon':>9}{'cm med rel err':>16}{'degree KS':>11}{'degree W1':>11}  gate")
    for r in result.rows:
        cm = r.get("contact_matrix_median_relative_error")
        cm = "n/a" if cm is None or cm != cm else f"{cm:.4g}"
        print(f"{r['unit']:<7}{r['min_size']:>9}{r['epsilon']:>9g}{cm:>16}{r['degree_ks']:>11.4g}"
              f"{r['degree_wasserstein1']:>11.4g}  {'pass' if r['gate_passed'] else 'FAIL ' + r['gate_failed']}")
    c = result.cheapest
    if c is None:
        print("no setting of the grid meets the policy's [gate] thresholds")
    else:
        print(f"cheapest setting meeting the [gate]: unit {c['unit']}, epsilon {c['epsilon']:g}, "
              f"min_size {c['min_size']}" + ("" if result.thresholds else " (the policy sets no thresholds)"))
    t = result.timings
    print(f"{t['grid_points']} grid points, {t['groupings']} grouping(s) counted, {t['total_seconds']:.1f} s; "
          f"table, plots and README.txt in {path} (confidential: do not publish)")
    return 0


def cmd_draft_policy(args):
    from .starter import draft_policy, write_draft_policy

    draft = draft_policy(args.nodes, args.attributes.split(","), unit=args.unit, codebook=args.codebook,
                         max_contacts=args.max_contacts, node_column=args.node_column, epsilon=args.epsilon,
                         min_size=args.min_size, edges=args.edges)
    path = write_draft_policy(args.out, draft, overwrite=args.overwrite,
                              inputs=(args.nodes, args.codebook, args.edges))
    print(f"wrote a starting policy to {path} (unit {draft.unit}, attributes {', '.join(draft.attributes)})")
    for note in draft.notes:
        print(f"  {note}")
    print(f"next: review {path} (every key is commented; docs/policy.md explains each), then")
    print(f"  aggpub release --policy {path} --edges {args.edges or 'EDGES'} --nodes {args.nodes} --out BUNDLE")
    return 0


def cmd_matrix(args):
    """``aggpub matrix`` (issue 13)."""
    from .bundle import check_bundle, read_bundle
    from .errors import BundleError, OutputError
    from .estimates.release_matrix import contact_matrix, plot_contact_matrix, write_matrix_csv

    if args.draws < 100:
        raise UsageError(f"'--draws' must be >= 100, got {args.draws}")
    res = check_bundle(args.bundle)
    if not res.ok:
        raise BundleError(f"{args.bundle}: bundle check failed ({len(res.problems)} problem(s), first: "
                          f"{res.problems[0]}); run 'aggpub check' for the list")
    for w in res.warnings:
        print(f"warning: {w}", file=sys.stderr)
    for path in (args.out, args.plot):
        if path is not None and path.exists() and not args.overwrite:
            raise OutputError(f"{path}: output file already exists (use --overwrite to replace it)")
    table = contact_matrix(read_bundle(args.bundle), args.by, layer=args.layer, per_person=args.per_person,
                           weight=args.weight, confidence=args.confidence, method=args.method, draws=args.draws,
                           seed=args.seed)
    out = write_matrix_csv(table, args.out, overwrite=args.overwrite)
    meta = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
    print(f"wrote the contact matrix by {meta['view']} ({table.num_rows:,} value pairs, layer "
          f"{args.layer or 'all'}, method {meta['method']}, {float(meta['confidence']):.0%} intervals) to {out}")
    if meta.get("note"):
        print(f"  note: {meta['note']}")
    if args.plot is not None:
        print(f"wrote the heat map to {plot_contact_matrix(table, args.plot, overwrite=args.overwrite)}")
    return 0


COMMANDS = {"release": cmd_release, "check": cmd_check, "demo": cmd_demo, "ledger": cmd_ledger,
            "sample": cmd_sample, "plan": cmd_plan, "sweep": cmd_sweep, "draft-policy": cmd_draft_policy,
            "matrix": cmd_matrix}


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    debug = "--debug" in argv
    parser = build_parser()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            warnings.showwarning = lambda msg, *a, **k: print(f"warning: {msg}", file=sys.stderr)
            args = parser.parse_args(argv)
            if not args.command:
                parser.print_help()
                return 2
            return COMMANDS[args.command](args)
    except AggpubError as exc:
        if debug:
            raise
        print(f"aggpub: {exc.kind}: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("aggpub: interrupted; nothing was published", file=sys.stderr)
        return 130
    except Exception as exc:  # an unexpected failure: one line, no private values
        if debug:
            raise
        print(f"aggpub: internal error: {type(exc).__name__} (run again with --debug for details)",
              file=sys.stderr)
        return 9


#: Set by a command that has closed and synced everything it opened (see :func:`run`).
_FINISHED_CLEANLY: list = []


#: Environment variables by which a user sets the BLAS library's threads (a value set is kept).
BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS")


def one_blas_thread() -> bool:
    """One thread for the BLAS library (OpenBLAS, as numpy and scipy ship it) during an ``aggpub`` command.

    A command runs its own parallel work: DuckDB's threads, the audit's threads and its
    helper process. OpenBLAS starts a thread per core for each call and keeps them
    spinning afterwards, so on two cores they take turns with ours. Measured, whole
    processes against the default: the demo town 1.84-1.93 s with this function
    (1.81-1.93 s with the variable set by hand) against 2.16-2.27 s (user CPU 2.8 s
    against 3.5 s); 10M contacts 5.22-5.24 s against 5.40-7.34 s (variable set by
    hand, two runs each); 1M unchanged. Libraries already loaded are limited through
    ``threadpoolctl``; ``OPENBLAS_NUM_THREADS=1`` covers those loaded later and the
    helper processes. Nothing changes when the user set one of
    :data:`BLAS_THREAD_VARIABLES`, and library use (``import aggpub``) is never affected.

    Returns
    -------
    bool
        Whether the limit was set.
    """
    if any(name in os.environ for name in BLAS_THREAD_VARIABLES):
        return False
    os.environ["OPENBLAS_NUM_THREADS"] = "1"
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")
    return True


#: The environment variable by which a user chooses Arrow's memory pool (a value set is kept).
ARROW_POOL_VARIABLE = "ARROW_DEFAULT_MEMORY_POOL"


def system_arrow_memory() -> bool:
    """Arrow's buffers from the C library's allocator (``pyarrow.system_memory_pool``) during an ``aggpub`` command.

    pyarrow's default pool (mimalloc in the wheels on Linux) backs its memory with transparent
    huge pages, and the kernel clears each 2 MiB page when first touched: in a release that is
    most of the system time (``perf``: ``clear_page_erms`` under ``mi_page_free_list_extend``),
    and it varies with how fragmented the machine's memory is. Measured on a 2-core machine,
    whole processes, interleaved (``benchmarks/README.md``, 2026-12-03): 10M contacts 6.16-6.46 s
    with the default against 4.28-4.81 s with the system pool (system time 3.1 against 1.5 s;
    jemalloc 5.31-5.34 s); the demo town median 1.85 against 1.64 s (8 runs each).

    Sets ``ARROW_DEFAULT_MEMORY_POOL=system`` (read when pyarrow is first imported; the audit's
    helper process inherits it) and, when pyarrow is already imported, sets the pool directly.
    Nothing changes when the user set the variable, and library use (``import aggpub``) is never
    affected. Speed only: Arrow holds the same values whichever allocator gave the memory.

    Returns
    -------
    bool
        Whether the pool was chosen here.
    """
    if ARROW_POOL_VARIABLE in os.environ:
        return False
    os.environ[ARROW_POOL_VARIABLE] = "system"
    if "pyarrow" in sys.modules:
        import pyarrow as pa

        pa.set_memory_pool(pa.system_memory_pool())
    return True


def run() -> None:
    """The ``aggpub`` command: :func:`main`, then exit with its code.

    After a successful release on DuckDB every output is synced and closed, the
    ledger's connections are closed and the engine (with its spill folder) is
    closed; the process then ends without the interpreter's teardown of the
    scientific libraries, which costs about a second and does nothing useful.
    Every other outcome exits normally. The BLAS library gets one thread (:func:`one_blas_thread`),
    Arrow the C library's allocator (:func:`system_arrow_memory`), and the process no transparent huge
    pages (:func:`aggpub.pages.no_huge_pages`), and the C library's allocator keeps freed memory for reuse
    (:func:`aggpub.pages.keep_freed_memory`).
    """
    from .pages import keep_freed_memory, no_huge_pages

    no_huge_pages()
    keep_freed_memory()
    one_blas_thread()
    system_arrow_memory()
    code = main()
    if code == 0 and _FINISHED_CLEANLY:
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(0)
    sys.exit(code)


if __name__ == "__main__":  # pragma: no cover
    run()
