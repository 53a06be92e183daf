#!/usr/bin/python3
"""Straightforward numpy reference of Woodham least-squares photometric stereo,
side by side with `lumenrig normals --method lsq` on the same session.

Usage: /usr/bin/python3 bench/reference/normals_lstsq.py SESSION_DIR LUMENRIG_CLI [THREADS]

Reads every OLAT frame with OpenCV (EXR via OPENCV_IO_ENABLE_OPENEXR, PNG),
divides by the light's RGB intensity, takes BT.709 gray, and solves
np.linalg.lstsq(L, I) over the masked pixels (the session mask, or pixels
with any signal). Times only the lstsq call, runs the lumenrig CLI (whose
"solve" figure also excludes decoding), prints both and their ratio, and the
mean angle between the two normal maps.
"""
import json
import os
import re
import subprocess
import sys
import tempfile
import time

os.environ["OPENCV_IO_ENABLE_OPENEXR"] = "1"
import cv2  # noqa: E402
import numpy as np  # noqa: E402


def main():
    session_dir, cli = sys.argv[1], sys.argv[2]
    threads = sys.argv[3] if len(sys.argv) > 3 else "0"
    session = json.load(open(os.path.join(session_dir, "session.json")))
    rig = json.load(open(os.path.join(session_dir, session["rig"])))
    lights = {l["id"]: l for l in rig["lights"]}
    cam = session["cameras"][0]
    dirs, stack = [], None
    t0 = time.perf_counter()
    for k, f in enumerate(cam["olat"]):
        img = cv2.imread(os.path.join(session_dir, f["path"]), cv2.IMREAD_UNCHANGED)
        if img.dtype == np.uint16:
            img = img.astype(np.float32) / 65535.0
        elif img.dtype == np.uint8:
            img = img.astype(np.float32) / 255.0
        rgb = img[..., ::-1].astype(np.float32) / np.asarray(lights[f["light"]]["intensity"], np.float32)
        gray = 0.2126 * rgb[..., 0] + 0.7152 * rgb[..., 1] + 0.0722 * rgb[..., 2]
        if stack is None:
            stack = np.empty((len(cam["olat"]), gray.size), np.float32)
            shape = gray.shape
        stack[k] = gray.ravel()
        dirs.append(lights[f["light"]]["direction"])
    read_s = time.perf_counter() - t0
    if "mask" in cam:
        mask = cv2.imread(os.path.join(session_dir, cam["mask"]), cv2.IMREAD_GRAYSCALE).ravel() > 0
    else:
        mask = stack.max(axis=0) > 1e-6
    L = np.asarray(dirs, np.float64)
    I = stack[:, mask].astype(np.float64)
    t1 = time.perf_counter()
    G, *_ = np.linalg.lstsq(L, I, rcond=None)
    numpy_s = time.perf_counter() - t1
    n_np = G / np.maximum(np.linalg.norm(G, axis=0), 1e-30)

    with tempfile.TemporaryDirectory() as out:
        t2 = time.perf_counter()
        r = subprocess.run([cli, "normals", session_dir, "--out", out, "--method", "lsq", "--no-depth",
                            "--threads", threads, "--mem-budget", "4G"], capture_output=True, text=True)
        wall_s = time.perf_counter() - t2
        if r.returncode != 0:
            sys.exit("lumenrig failed: " + r.stderr)
        solve_s = float(re.search(r"solve ([0-9.]+) s", r.stdout).group(1))
        lr_read_s = float(re.search(r"read ([0-9.]+) s", r.stdout).group(1))
        normals = cv2.imread(os.path.join(out, "normals.exr"), cv2.IMREAD_UNCHANGED)[..., ::-1]
    n_lr = normals.reshape(-1, 3)[mask].T
    cosang = np.clip(np.sum(n_lr * n_np, axis=0), -1, 1)
    print(f"pixels {int(mask.sum())} of {shape[1]}x{shape[0]}, lights {len(dirs)}")
    print(f"numpy  np.linalg.lstsq (float64, masked pixels): {numpy_s:.3f} s   (reading with cv2: {read_s:.2f} s)")
    print(f"lumenrig least-squares solve ({threads} threads, all pixels): {solve_s:.3f} s"
          f"   (reading: {lr_read_s:.2f} s, whole CLI: {wall_s:.2f} s)")
    print(f"ratio numpy / lumenrig solve: {numpy_s / solve_s:.1f}x")
    print(f"mean angle between the two normal maps: {np.degrees(np.arccos(cosang)).mean():.4f} deg")


if __name__ == "__main__":
    main()
