"""Print, write or check ``docs/policy.md``, the policy reference generated from ``aggpub/policy.py``.

    python scripts/policy_reference.py > docs/policy.md   # print (here: regenerate)
    python scripts/policy_reference.py --write            # write docs/policy.md beside this script's repo
    python scripts/policy_reference.py --check            # exit 1 if docs/policy.md is out of date

The reference comes from the key table (``aggpub.policy.POLICY_KEYS``), the
sections, the rules and the complete example; ``tests/test_policy_reference.py``
regenerates it and compares, so a key added to the table without regenerating
the document fails the suite.
"""

from __future__ import annotations

import argparse
import difflib
import sys
from pathlib import Path

from aggpub.policy import policy_reference

DOC = Path(__file__).resolve().parents[1] / "docs" / "policy.md"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Print, write or check docs/policy.md.")
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--write", action="store_true", help=f"write {DOC}")
    group.add_argument("--check", action="store_true", help=f"exit 1 if {DOC} differs from the generated text")
    args = parser.parse_args(argv)
    text = policy_reference()
    if args.write:
        DOC.write_text(text, encoding="utf-8")
        print(f"wrote {DOC}")
        return 0
    if args.check:
        current = DOC.read_text(encoding="utf-8") if DOC.exists() else ""
        if current == text:
            print(f"{DOC}: up to date")
            return 0
        sys.stdout.writelines(difflib.unified_diff(current.splitlines(True), text.splitlines(True),
                                                   str(DOC), "generated", n=1))
        print(f"{DOC}: out of date; run: python scripts/policy_reference.py --write", file=sys.stderr)
        return 1
    sys.stdout.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
