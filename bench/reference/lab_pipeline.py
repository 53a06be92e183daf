#!/usr/bin/python3
"""The usual lab script, as a reference for `lumenrig run` benchmarks.

A straightforward pipeline on Debian's python3-numpy, python3-opencv and
python3-h5py: read every OLAT frame of every camera into memory, least-squares
normals (np.linalg.lstsq), a difference matte against the clean plate, one
relight with uniform weights, and write everything to HDF5. It is what a lab
writes first; it is not tuned, on purpose, but it is not crippled either
(vectorised numpy, one lstsq over all masked pixels).

Usage: lab_pipeline.py SESSION_DIR OUT.h5
Prints wall time and peak RSS (ru_maxrss).
"""
import json
import os
import resource
import sys
import time

os.environ.setdefault("OPENCV_IO_ENABLE_OPENEXR", "1")
import cv2  # noqa: E402
import h5py  # noqa: E402
import numpy as np  # noqa: E402


def read(path):
    img = cv2.imread(path, cv2.IMREAD_UNCHANGED | cv2.IMREAD_ANYDEPTH | cv2.IMREAD_ANYCOLOR)
    if img is None:
        raise SystemExit(f"{path}: cannot read")
    if img.dtype == np.uint8:
        img = img.astype(np.float32) / 255.0
    elif img.dtype == np.uint16:
        img = img.astype(np.float32) / 65535.0
    else:
        img = img.astype(np.float32)
    if img.ndim == 3:
        img = img[:, :, ::-1]  # BGR -> RGB
    return img


def main():
    t0 = time.time()
    session_dir, out_path = sys.argv[1], sys.argv[2]
    session = json.load(open(os.path.join(session_dir, "session.json")))
    rig = json.load(open(os.path.join(session_dir, session["rig"])))
    lights = {l["id"]: l for l in rig["lights"]}
    black = float(session.get("black_level", 0.0))
    with h5py.File(out_path, "w") as out:
        for cam in session["cameras"]:
            frames = [read(os.path.join(session_dir, f["path"])) - black for f in cam["olat"]]
            stack = np.stack(frames)  # N,H,W,3
            intens = np.array([lights[f["light"]]["intensity"] for f in cam["olat"]], np.float32)
            stack /= intens[:, None, None, :]
            dirs = np.array([lights[f["light"]]["direction"] for f in cam["olat"]], np.float32)
            R = np.array(cam.get("camera_from_rig", np.eye(4)), np.float32)[:3, :3]
            L = dirs @ R.T
            gray = stack.mean(axis=3)  # N,H,W
            n, h, w = gray.shape
            mask = gray.max(axis=0) > 0.02
            I = gray[:, mask]  # N,P
            G, *_ = np.linalg.lstsq(L, I, rcond=None)  # 3,P
            rho = np.linalg.norm(G, axis=0)
            normals = np.zeros((h, w, 3), np.float32)
            normals[mask] = (G / np.maximum(rho, 1e-8)).T
            albedo = np.zeros((h, w, 3), np.float32)
            shading = np.clip(L @ (G / np.maximum(rho, 1e-8)), 0, None)  # N,P
            for c in range(3):
                num = (stack[:, :, :, c][:, mask] * shading).sum(axis=0)
                den = (shading * shading).sum(axis=0) + 1e-8
                albedo[mask, c] = np.pi * num / den
            plate = read(os.path.join(session_dir, cam["clean_plate"])) - black
            lit = read(os.path.join(session_dir, cam["lit"])) - black
            diff = np.abs(lit - plate).sum(axis=2)
            alpha = np.clip(diff / 0.15, 0, 1).astype(np.float32)
            relit = stack.mean(axis=0)
            g = out.create_group("cameras/" + cam["id"])
            for name, arr in (("normals", normals), ("albedo", albedo), ("alpha", alpha[:, :, None]),
                              ("relit", relit)):
                g.create_dataset(name, data=arr.astype(np.float16), chunks=True, compression="gzip",
                                 shuffle=True)
            del stack, frames
    rss_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(f"reference: {time.time() - t0:.2f} s, peak RSS {rss_mib:.0f} MiB")


if __name__ == "__main__":
    main()
