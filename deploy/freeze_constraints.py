"""Write constraints.txt: the installed version of every package in the closure of '.[test,dev]'.

Run after `pip install -e '.[test,dev]'` on a clean Python 3.11 (the CI machine's), once the full
suite and the gates pass:  python deploy/freeze_constraints.py > constraints.txt
Only the project's own dependency closure is pinned, not whatever else the machine holds.
"""

from __future__ import annotations

import importlib.metadata as md
import re

from packaging.markers import default_environment
from packaging.requirements import Requirement


def _key(name: str) -> str:
    return re.sub(r"[-_.]+", "-", name).lower()


def closure(root: str, extras: tuple[str, ...]) -> dict[str, str]:
    seen: dict[str, str] = {}

    def walk(name: str, wanted: tuple[str, ...]) -> None:
        try:
            dist = md.distribution(name)
        except md.PackageNotFoundError:
            return
        seen[_key(name)] = dist.version
        for line in dist.requires or []:
            req = Requirement(line)
            applies = req.marker is None or any(
                req.marker.evaluate({**default_environment(), "extra": e}) for e in ("", *wanted)
            )
            if applies and _key(req.name) not in seen:
                walk(req.name, tuple(req.extras))

    walk(root, extras)
    seen.pop(_key(root), None)
    return seen


def main() -> None:
    print("# The versions CI tested (Python 3.11), the whole dependency closure of '.[test,dev]'.")
    print("# Install with: pip install -c constraints.txt -e '.[test,dev]'.")
    print("# Regenerate: DEVELOPERS.md, 'Gates and dependencies'.")
    for name, version in sorted(closure("trialhouse", ("test", "dev")).items()):
        print(f"{name}=={version}")


if __name__ == "__main__":
    main()
