"""Shared test helper: edit a built set's column and re-seal its manifest.

After the edit the column's checksum matches again, so only verify's row checks can tell.
"""

import hashlib
import json

import h5py
import numpy as np


def tamper(path, split, column, edit):
    """Apply ``edit`` (in place, on the column's array) and re-seal the manifest entry."""
    with h5py.File(path, "r+") as f:
        data = f[split][column][:]
        edit(data)
        f[split][column][...] = data
        manifest = json.loads(f.attrs["manifest"])
        manifest[f"{split}/{column}"] = hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()
        f.attrs["manifest"] = json.dumps(manifest, sort_keys=True)
