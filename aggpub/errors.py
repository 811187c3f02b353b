"""One exception hierarchy for aggpub.

Every error names the file, column, row or policy key at fault, never a private
value from the input (person ids, attribute values) unless the caller asked for
debug output. The command line maps each class to a documented exit code.

========================  =========  ==========================================
class                     exit code  meaning
========================  =========  ==========================================
``UsageError``            2          bad command-line arguments
``InputError``            3          an input file is missing, unreadable or malformed
``PolicyError``           4          the release policy is invalid
``PrivacyError``          5          the request would break the privacy guarantee
``BudgetError``           5          the release would exceed a privacy budget
``GateError``             6          a utility threshold of the policy failed
``OutputError``           7          the output cannot be written where asked
``BundleError``           8          a bundle failed verification
``AggpubError`` (other)   9          internal error
========================  =========  ==========================================
"""

from __future__ import annotations

__all__ = [
    "AggpubError",
    "UsageError",
    "InputError",
    "PolicyError",
    "PrivacyError",
    "BudgetError",
    "GateError",
    "OutputError",
    "BundleError",
    "closest_name",
]

import difflib


class AggpubError(Exception):
    """Base class of every error aggpub raises on purpose."""

    exit_code = 9
    kind = "internal error"


class UsageError(AggpubError):
    """The command line was used wrongly."""

    exit_code = 2
    kind = "usage error"


class InputError(AggpubError):
    """An input file is missing, unreadable or malformed."""

    exit_code = 3
    kind = "input error"


class PolicyError(AggpubError):
    """The release policy is invalid (unknown key, wrong type, out of range)."""

    exit_code = 4
    kind = "policy error"


class PrivacyError(AggpubError):
    """The request would void the stated privacy guarantee."""

    exit_code = 5
    kind = "privacy error"


class BudgetError(PrivacyError):
    """A release would exceed the release budget or the lifetime budget."""

    exit_code = 5
    kind = "budget error"


class GateError(AggpubError):
    """A utility threshold of the policy's gate failed; nothing was published."""

    exit_code = 6
    kind = "gate failed"


class OutputError(AggpubError):
    """The output cannot be written where asked."""

    exit_code = 7
    kind = "output error"


class BundleError(AggpubError):
    """A release bundle failed verification."""

    exit_code = 8
    kind = "bundle error"


def closest_name(name: str, known) -> str:
    """Return `` (did you mean 'x'?)`` for the closest known name, or ``''``."""
    name = str(name)
    known = [str(k) for k in known]
    match = difflib.get_close_matches(name, known, n=1, cutoff=0.6)
    if not match and len(name) >= 3:
        match = [k for k in known if k.lower().startswith(name.lower()) or name.lower().startswith(k.lower())][:1]
    return f" (did you mean '{match[0]}'?)" if match else ""
