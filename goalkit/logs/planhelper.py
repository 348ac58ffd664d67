"""The helper process of :mod:`goalkit.logs.planspawn`: plans groups ``start ..`` of a grouped log.

Run as ``python -m goalkit.logs.planhelper``; reads the pickled request on stdin, writes the
pickled answer on stdout, and exits with status 1 (no answer) on any error, for the caller to
plan those groups itself.
"""

from __future__ import annotations

import pickle
import sys

from goalkit.logs.access import DatasetOwners, open_h5
from goalkit.logs.grouped import GroupedSource, match_groups
from goalkit.logs.limits import regular_file
from goalkit.logs.planspawn import groups_digest


def plan_part(request: dict) -> dict:
    """Plan groups ``request["start"] ..`` of the log; the answer for the caller."""
    src = GroupedSource.__new__(GroupedSource)
    src.path, src.layout = str(request["path"]), request["layout"]
    src.skip_bad_episodes = False
    src.key_dtypes = {}
    src.file_size = regular_file(src.path, what="an HDF5 file")
    with open_h5(src.path) as h5:
        src.groups = match_groups(h5, src.layout.episode_groups, src.path)
        if len(src.groups) != request["total"] or groups_digest(src.groups) != request["digest"]:
            raise ValueError("the log's groups changed")
        start = int(request["start"])
        seen = DatasetOwners(lambda e, ident: "")
        metas, _ = src._plan_range(h5, seen, start, len(src.groups))
    return {"metas": metas, "owners": seen.claims(start), "key_dtypes": src.key_dtypes}


def main() -> int:
    try:
        answer = plan_part(pickle.loads(sys.stdin.buffer.read()))
        data = pickle.dumps(answer, protocol=pickle.HIGHEST_PROTOCOL)
    except BaseException:             # noqa: BLE001  no answer: the caller plans these groups
        return 1
    sys.stdout.buffer.write(data)
    sys.stdout.buffer.flush()
    return 0


if __name__ == "__main__":
    sys.exit(main())
