"""Shared test helpers: edit a built set and re-seal it, as a deliberate editor would.

After :func:`tamper` the column's manifest entry and the set's seal match again, so only
verify's re-derivation can tell.
"""

import hashlib
import json

import h5py
import numpy as np

from goalkit.write.seal import write_seal


def reseal(path):
    """Recompute every manifest entry of the stored columns and the seal, in place."""
    with h5py.File(path, "r+") as f:
        manifest = json.loads(f.attrs["manifest"])
        for key in manifest:
            split, name = key.split("/", 1)
            if name in f[split]:
                data = f[split][name][:]
                manifest[key] = hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()
        f.attrs["manifest"] = json.dumps(manifest, sort_keys=True)
        if "seal" in f.attrs:
            write_seal(f)


def tamper(path, split, column, edit):
    """Apply ``edit`` (in place, on the column's array) and re-seal the manifest entry and seal."""
    with h5py.File(path, "r+") as f:
        data = f[split][column][:]
        edit(data)
        f[split][column][...] = data
        manifest = json.loads(f.attrs["manifest"])
        manifest[f"{split}/{column}"] = hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()
        f.attrs["manifest"] = json.dumps(manifest, sort_keys=True)
        if "seal" in f.attrs:
            write_seal(f)
