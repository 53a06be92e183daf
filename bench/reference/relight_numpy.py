#!/usr/bin/env python3
"""Straightforward numpy reference for `lumenrig pairs` (issue 6 benchmark).

Loads the whole OLAT stack of the first camera into memory, then for each
sample relights with numpy.einsum over the stack per map (input and target),
crops/resizes, renders the background, composites, simulates the camera
(exposure, white balance, noise, sRGB, JPEG), computes SH diffuse and Phong
specular light maps, and writes the same fields with h5py (float16, one
sample per chunk, gzip + shuffle). Prints pairs/s and peak RSS.

Debian python3-numpy, python3-opencv, python3-h5py only.
Usage: relight_numpy.py SESSION_DIR ENVS_DIR COUNT SIZE OUT.h5 [SEED]
"""
import glob
import json
import os
import resource
import sys
import time

os.environ.setdefault("OPENCV_IO_ENABLE_OPENEXR", "1")
import cv2  # noqa: E402
import h5py  # noqa: E402
import numpy as np  # noqa: E402


def latlong_dirs(h):
    w = 2 * h
    v, u = np.meshgrid(np.arange(h) + 0.5, np.arange(w) + 0.5, indexing="ij")
    theta, phi = np.pi * v / h, 2 * np.pi * u / w
    d = np.stack([-np.sin(theta) * np.sin(phi), np.cos(theta), np.sin(theta) * np.cos(phi)], -1)
    dw = (2 * np.pi / w) * (np.pi / h) * np.sin(theta)
    return d, dw


def lookup(latlong, d):
    h, w = latlong.shape[:2]
    theta = np.arccos(np.clip(d[..., 1], -1, 1))
    phi = np.mod(np.arctan2(-d[..., 0], d[..., 2]), 2 * np.pi)
    u = np.clip((phi * w / (2 * np.pi)).astype(int), 0, w - 1)
    v = np.clip((theta * h / np.pi).astype(int), 0, h - 1)
    return latlong[v, u]


def sh9(d):
    x, y, z = d[..., 0], d[..., 1], d[..., 2]
    return np.stack([0.282095 * np.ones_like(x), 0.488603 * y, 0.488603 * z, 0.488603 * x, 1.092548 * x * y,
                     1.092548 * y * z, 0.315392 * (3 * z * z - 1), 1.092548 * x * z, 0.546274 * (x * x - y * y)], -1)


def read_rgb(path):
    img = cv2.imread(path, cv2.IMREAD_UNCHANGED)
    return cv2.cvtColor(img, cv2.COLOR_BGR2RGB).astype(np.float32)


def main():
    session_dir, envs_dir, count, size, out = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), sys.argv[5]
    seed = int(sys.argv[6]) if len(sys.argv) > 6 else 0
    t0 = time.time()
    session = json.load(open(os.path.join(session_dir, "session.json")))
    rig = json.load(open(os.path.join(session_dir, session["rig"])))
    cam = session["cameras"][0]
    lights = {l["id"]: l for l in rig["lights"]}
    stack = np.stack([read_rgb(os.path.join(session_dir, f["path"])) for f in cam["olat"]])  # N,H,W,3
    ids = [f["light"] for f in cam["olat"]]
    dirs = np.array([lights[i].get("direction") or lights[i]["position"] for i in ids], float)
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    intensity = np.array([lights[i]["intensity"] for i in ids], float)
    truth = os.path.join(session_dir, "truth", cam["id"])
    albedo, normals = read_rgb(os.path.join(truth, "albedo.exr")), read_rgb(os.path.join(truth, "normals.exr"))
    alpha = cv2.imread(os.path.join(truth, "alpha.exr"), cv2.IMREAD_UNCHANGED).astype(np.float32)
    if alpha.ndim == 3:
        alpha = alpha[..., 0]
    rs = lambda im: cv2.resize(im, (size, size), interpolation=cv2.INTER_AREA)
    albedo_s, alpha_s, normals_s = rs(albedo), rs(alpha), rs(normals)
    normals_s /= np.maximum(np.linalg.norm(normals_s, axis=-1, keepdims=True), 1e-6)
    normals_s[alpha_s <= 0] = 0
    # Voronoi cells of the lights on a 256 x 512 grid.
    gd, gdw = latlong_dirs(256)
    cell = np.argmax(gd.reshape(-1, 3) @ dirs.T, axis=1)
    # Environment maps: normalised, SH-ready, Phong-prefiltered once.
    exps = [1.0, 16.0, 32.0, 64.0]
    sd, sdw = latlong_dirs(64)
    od, _ = latlong_dirs(32)
    envs = []
    for p in sorted(glob.glob(os.path.join(envs_dir, "*.exr")) + glob.glob(os.path.join(envs_dir, "*.hdr"))):
        m = np.nan_to_num(read_rgb(p), nan=0, posinf=0, neginf=0).clip(0, None)
        small = cv2.resize(m, (512, 256), interpolation=cv2.INTER_AREA)
        y = small @ np.array([0.2126, 0.7152, 0.0722])
        m *= 0.5 / ((y * gdw).sum() / (4 * np.pi))
        small = cv2.resize(m, (512, 256), interpolation=cv2.INTER_AREA)
        src = cv2.resize(m, (128, 64), interpolation=cv2.INTER_AREA).reshape(-1, 3) * sdw.reshape(-1, 1)
        cosines = np.clip(od.reshape(-1, 3) @ sd.reshape(-1, 3).T, 0, None)
        spec = [((s + 1) / (2 * np.pi) * cosines ** s @ src).reshape(32, 64, 3) for s in exps]
        envs.append((os.path.basename(p), m, small, spec))
    # Camera rays at the output size.
    k = cam.get("intrinsics", {"fx": stack.shape[2], "fy": stack.shape[1], "cx": stack.shape[2] / 2, "cy": stack.shape[1] / 2})
    sx = size / stack.shape[2]
    yy, xx = np.meshgrid(np.arange(size) + 0.5, np.arange(size) + 0.5, indexing="ij")
    rays = np.stack([(xx - k["cx"] * sx) / (k["fx"] * sx), -(yy - k["cy"] * sx) / (k["fy"] * sx), -np.ones_like(xx)], -1)
    rays /= np.linalg.norm(rays, axis=-1, keepdims=True)
    rng = np.random.default_rng(seed)
    f = h5py.File(out, "w")
    f.attrs["format"] = "lumenrig.pairs/1"
    g = f.create_group("pairs")
    shapes = {"input": 3, "target": 3, "alpha": 1, "albedo": 3, "normals": 3, "background": 3, "light_diffuse": 3}
    ds = {n: g.create_dataset(n, (count, size, size, c), np.float16, chunks=(1, size, size, c), compression="gzip",
                              compression_opts=4, shuffle=True) for n, c in shapes.items()}
    ds["light_specular"] = g.create_dataset("light_specular", (count, size, size, len(exps), 3), np.float16,
                                            chunks=(1, size, size, len(exps), 3), compression="gzip",
                                            compression_opts=4, shuffle=True)
    t_setup = time.time() - t0
    t1 = time.time()
    for i in range(count):
        e_in, e_tgt = envs[rng.integers(len(envs))], envs[rng.integers(len(envs))]
        shift_in, shift_tgt = rng.integers(512), rng.integers(512)
        relit = []
        for e, shift in ((e_in, shift_in), (e_tgt, shift_tgt)):
            rot = np.roll(e[2], -shift, axis=1).reshape(-1, 3) * gdw.reshape(-1, 1)
            w = np.stack([np.bincount(cell, rot[:, c], len(dirs)) for c in range(3)], -1) / intensity
            relit.append(rs(np.einsum("nhwc,nc->hwc", stack, w.astype(np.float32))))
        rot_in = np.roll(e_in[1], -shift_in * e_in[1].shape[1] // 512, axis=1)
        bg = lookup(rot_in, rays)
        comp = relit[0] + (1 - alpha_s[..., None]) * bg
        comp = comp * 2 ** (0.3 * rng.standard_normal()) * np.array([np.exp(0.05 * rng.standard_normal()), 1, np.exp(0.05 * rng.standard_normal())])
        comp = np.clip(comp + rng.standard_normal(comp.shape) * np.sqrt(0.002 ** 2 + 0.0005 * np.clip(comp, 0, None)), 0, 1)
        enc = np.where(comp <= 0.0031308, 12.92 * comp, 1.055 * comp ** (1 / 2.4) - 0.055)
        if rng.random() < 0.5:
            ok, buf = cv2.imencode(".jpg", (enc[..., ::-1] * 255).astype(np.uint8), [cv2.IMWRITE_JPEG_QUALITY, 85])
            enc = cv2.imdecode(buf, cv2.IMREAD_COLOR)[..., ::-1] / 255.0
        rot_t = np.roll(e_tgt[2], -shift_tgt, axis=1)
        small64 = cv2.resize(rot_t, (128, 64), interpolation=cv2.INTER_AREA)
        coeffs = (sh9(sd).reshape(-1, 9) * sdw.reshape(-1, 1)).T @ small64.reshape(-1, 3)  # 9 x 3
        a = np.array([np.pi] + [2 * np.pi / 3] * 3 + [np.pi / 4] * 5)
        diffuse = (sh9(normals_s).reshape(-1, 9) * a) @ coeffs / np.pi
        refl = rays - 2 * np.sum(rays * normals_s, -1, keepdims=True) * normals_s
        spec = np.stack([lookup(np.roll(s, -shift_tgt * 64 // 512, axis=1), refl) for s in e_tgt[3]], -2)
        ds["input"][i] = enc
        ds["target"][i] = relit[1] * (alpha_s[..., None] > 0)
        ds["alpha"][i] = alpha_s[..., None]
        ds["albedo"][i] = albedo_s
        ds["normals"][i] = normals_s
        ds["background"][i] = bg
        ds["light_diffuse"][i] = diffuse.reshape(size, size, 3) * (alpha_s[..., None] > 0)
        ds["light_specular"][i] = spec * (alpha_s[..., None, None] > 0)
    f.close()
    dt = time.time() - t1
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"numpy reference: {count} pairs in {dt:.2f} s = {count / dt:.3f} pairs/s "
          f"(setup {t_setup:.2f} s, total {time.time() - t0:.2f} s), peak RSS {rss:.0f} MiB")


if __name__ == "__main__":
    main()
