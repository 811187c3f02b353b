"""aggpub: privacy-aware publication of aggregated contact networks.

Group people into supernodes of at least k members, add calibrated discrete
Laplace noise to superedge counts under a stated epsilon, and write a verifiable
Parquet bundle.

The public API is listed in ``__all__``; everything else is internal.
"""

from ._version import __version__
from .bundle import Bundle, CheckResult, check_bundle, read_bundle
from .errors import (AggpubError, BudgetError, BundleError, GateError, InputError, OutputError, PolicyError,
                     PrivacyError, UsageError)
from .ingest import load_network
from .network import Network
from .pipeline import build_release, publish, release_tables, run_release
from .results import Release
from .policy import ReleasePolicy, parse_policy, read_policy
from .estimates.intervals import SumInterval, cell_mask, interval
from .estimates.supergraph import supergraph
from .estimates.release_matrix import contact_matrix, plot_contact_matrix
from .synthesis import sample_network, synthetic_people, write_sample
from .sweep import SweepResult, run_sweep, write_sweep

__all__ = [
    "__version__",
    "AggpubError", "BudgetError", "BundleError", "GateError", "InputError", "OutputError", "PolicyError",
    "PrivacyError", "UsageError",
    "Bundle", "CheckResult", "check_bundle", "read_bundle",
    "Network", "load_network",
    "Release", "build_release", "publish", "release_tables", "run_release",
    "ReleasePolicy", "parse_policy", "read_policy",
    "SumInterval", "cell_mask", "interval", "sample_network", "supergraph", "synthetic_people", "write_sample",
    "SweepResult", "run_sweep", "write_sweep",
    "contact_matrix", "plot_contact_matrix",
]
