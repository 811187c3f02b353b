"""aggpub: privacy-aware publication of aggregated contact networks.

Group people into supernodes of at least k members, add calibrated discrete
Laplace noise to superedge counts under a stated epsilon, and write a verifiable
Parquet bundle.

The public API is listed in ``__all__``; everything else is internal.
"""

from typing import TYPE_CHECKING

from ._lazy import lazy_attributes
from ._version import __version__
from .errors import (AggpubError, BudgetError, BundleError, GateError, InputError, OutputError, PolicyError,
                     PrivacyError, UsageError)

_LAZY = {
    "Bundle": ".bundle", "CheckResult": ".bundle", "check_bundle": ".bundle", "read_bundle": ".bundle",
    "load_network": ".ingest", "Network": ".network",
    "build_release": ".pipeline", "publish": ".pipeline", "release_tables": ".pipeline", "run_release": ".pipeline",
    "Release": ".results",
    "ReleasePolicy": ".policy", "parse_policy": ".policy", "read_policy": ".policy",
    "SumInterval": ".estimates.intervals", "cell_mask": ".estimates.intervals", "interval": ".estimates.intervals",
    "supergraph": ".estimates.supergraph",
    "contact_matrix": ".estimates.release_matrix", "plot_contact_matrix": ".estimates.release_matrix",
    "sample_network": ".synthesis", "synthetic_people": ".synthesis", "write_sample": ".synthesis",
    "SweepResult": ".sweep", "run_sweep": ".sweep", "write_sweep": ".sweep",
}
__getattr__, __dir__ = lazy_attributes(__name__, globals(), _LAZY)

if TYPE_CHECKING:  # the same names, eagerly, for type checkers and editors
    from .bundle import Bundle, CheckResult, check_bundle, read_bundle
    from .estimates.intervals import SumInterval, cell_mask, interval
    from .estimates.release_matrix import contact_matrix, plot_contact_matrix
    from .estimates.supergraph import supergraph
    from .ingest import load_network
    from .network import Network
    from .pipeline import build_release, publish, release_tables, run_release
    from .policy import ReleasePolicy, parse_policy, read_policy
    from .results import Release
    from .sweep import SweepResult, run_sweep, write_sweep
    from .synthesis import sample_network, synthetic_people, write_sample

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
