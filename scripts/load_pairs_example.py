#!/usr/bin/env python3
"""Load a batch of relit training pairs from a lumenrig.pairs/1 HDF5 file.

Needs only h5py and numpy (Debian: python3-h5py, python3-numpy).
Usage: python3 scripts/load_pairs_example.py PAIRS.h5 [BATCH_SIZE]
"""
import sys

import h5py
import numpy as np


def load_batch(path, start=0, size=4, split="train"):
    """Returns a dict of float32 arrays [B, H, W, C] for samples of one split."""
    with h5py.File(path, "r") as f:
        assert f.attrs["format"] == "lumenrig.pairs/1", f.attrs["format"]
        pairs = f["pairs"]
        splits = pairs["split"].asstr()[...]
        index = np.flatnonzero(splits == split)[start:start + size]
        batch = {}
        for name in ("input", "target", "alpha", "albedo", "normals", "background",
                     "light_diffuse", "light_specular"):
            batch[name] = pairs[name][index].astype(np.float32)  # stored as float16
        batch["subject"] = pairs["subject"].asstr()[index]
        batch["exponents"] = pairs["light_specular"].attrs["exponents"]
        batch["input_encoding"] = pairs["input"].attrs["encoding"]
        return batch


if __name__ == "__main__":
    path = sys.argv[1]
    size = int(sys.argv[2]) if len(sys.argv) > 2 else 4
    with h5py.File(path, "r") as f:
        split = f["pairs"]["split"].asstr()[0]  # a split that exists in this file
    b = load_batch(path, size=size, split=split)
    for key in ("input", "target", "alpha", "albedo", "normals", "light_diffuse", "light_specular"):
        print(f"{key:15s} {b[key].shape} {b[key].dtype} min {b[key].min():.3f} max {b[key].max():.3f}")
    print("split", split, "subjects", sorted(set(b["subject"])), "specular exponents", list(b["exponents"]),
          "input encoding", b["input_encoding"])
