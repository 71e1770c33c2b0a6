"""Benchmark: the screen-image pipeline on 1920x1200 16-bit frames.

Synthetic camera frames (rotated Gaussian spot, Poisson noise, dark offset and
read noise, hot pixels) are analysed by :func:`diagnostics.images.analyze_image`
with its defaults (dark subtraction, ROI, hot pixels, moments, projections).
The plain reference is a full-frame rotated-2D-Gaussian ``scipy.optimize.curve_fit``
on the dark-subtracted frame, as one would write it without a pipeline.  Prints
ms per frame (CPU time, one core), the ratio, and the sizes against the truth.

Run: ``.venv/bin/python bench/bench_images.py``
"""

from __future__ import annotations

import os
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from scipy.optimize import curve_fit  # noqa: E402

from diagnostics.images import analyze_image  # noqa: E402

SHAPE = (1200, 1920)
N_FRAMES = 8


def spot(shape, cx, cy, sx, sy, rho, amp):
    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]].astype(np.float32)
    s = np.array([[sx * sx, rho * sx * sy], [rho * sx * sy, sy * sy]])
    si = np.linalg.inv(s).astype(np.float32)
    dx, dy = xx - np.float32(cx), yy - np.float32(cy)
    return amp * np.exp(-0.5 * (si[0, 0] * dx * dx + 2 * si[0, 1] * dx * dy + si[1, 1] * dy * dy))


def make_frames(seed: int = 0):
    rng = np.random.default_rng(seed)
    frames, truths = [], []
    dark = np.round(100 + rng.normal(0, 3, SHAPE)).astype(np.uint16)
    for _ in range(N_FRAMES):
        cx, cy = rng.uniform(600, 1300), rng.uniform(400, 800)
        sx, sy, rho = rng.uniform(15, 40), rng.uniform(10, 30), rng.uniform(-0.5, 0.5)
        img = rng.poisson(spot(SHAPE, cx, cy, sx, sy, rho, 3000.0)).astype(np.float32) + dark
        img += rng.normal(0, 3, SHAPE).astype(np.float32)
        hot = rng.integers(0, SHAPE[0] * SHAPE[1], 50)
        img.flat[hot] += 20000
        frames.append(np.clip(np.round(img), 0, 65535).astype(np.uint16))
        truths.append((cx, cy, sx, sy, rho))
    return frames, dark, truths


def g2d(xy, a, x0, y0, sxx, syy, sxy, b):
    x, y = xy
    det = sxx * syy - sxy * sxy
    dx, dy = x - x0, y - y0
    return a * np.exp(-0.5 * (syy * dx * dx - 2 * sxy * dx * dy + sxx * dy * dy) / det) + b


def reference(frame, dark, truth):
    """Full-frame curve_fit of a rotated 2D Gaussian (started near the truth, to be generous)."""
    z = frame.astype(np.float64) - dark
    yy, xx = np.mgrid[0 : SHAPE[0], 0 : SHAPE[1]]
    cx, cy, sx, sy, rho = truth
    p0 = [z.max(), cx + 2, cy - 2, (1.1 * sx) ** 2, (0.9 * sy) ** 2, 0.0, 0.0]
    popt, _ = curve_fit(g2d, (xx.ravel().astype(float), yy.ravel().astype(float)), z.ravel(), p0=p0)
    return popt


def main() -> None:
    frames, dark, truths = make_frames()
    analyze_image(frames[0], pixel_size_m=2e-5, dark=dark)  # warm-up
    best = np.inf
    results = []
    for _ in range(3):
        t0 = time.process_time()
        results = [analyze_image(f, pixel_size_m=2e-5, dark=dark) for f in frames]
        best = min(best, (time.process_time() - t0) / N_FRAMES)
    t0 = time.process_time()
    results_np = [analyze_image(f, pixel_size_m=2e-5, dark=dark, projections=False) for f in frames]
    t_np = (time.process_time() - t0) / N_FRAMES
    t0 = time.process_time()
    popt = reference(frames[0], dark, truths[0])
    t_ref = time.process_time() - t0
    f = 0.99946  # iterated +-4 sigma window factor (diagnostics.profiles.iterated_window_rms_factor(4))
    err_x = [abs(r.sigma_x_m / 2e-5 / f / t[2] - 1) for r, t in zip(results, truths, strict=True)]
    err_y = [abs(r.sigma_y_m / 2e-5 / f / t[3] - 1) for r, t in zip(results, truths, strict=True)]
    err_r = [abs(r.correlation - t[4]) for r, t in zip(results, truths, strict=True)]
    print(f"frames: {N_FRAMES} x {SHAPE[1]}x{SHAPE[0]} uint16, spot sigma 10-40 px, 50 hot pixels each; CPU time per frame")
    print(f"analyze_image (defaults)      : {best * 1e3:7.1f} ms/frame   (target <= 20 ms, goal 10 ms)")
    print(f"analyze_image (no projections): {t_np * 1e3:7.1f} ms/frame")
    print(f"full-frame 2D curve_fit (ref) : {t_ref * 1e3:7.1f} ms/frame")
    print(f"speed-up: {t_ref / best:.0f}x")
    print(f"max |sigma/truth - 1| (window-corrected): x {max(err_x):.2e}, y {max(err_y):.2e}; max |rho - truth| {max(err_r):.3f}")
    print(f"reference fit sigma_x/truth - 1 = {np.sqrt(popt[3]) / truths[0][2] - 1:.2e}; flags: {sorted({fl for r in results for fl in r.flags}) or 'none'}")
    assert len(results_np) == N_FRAMES


if __name__ == "__main__":
    main()
