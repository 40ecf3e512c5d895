"""Measurement core: accuracy against the Cramér–Rao bound, honesty of the uncertainties,
and speed against the floor "read the TIFF + one numpy rfft2".

The bound is the exact Fisher information of the 2-D sinusoid B + A cos(2π f·(r - c) + φ)
in white Gaussian noise with (B, A, f_x, f_y, φ) unknown (S. M. Kay, Fundamentals of
Statistical Signal Processing: Estimation Theory, 1993, example 3.14, extended to 2-D).
SNR here is A/σ, the fringe amplitude over the per-pixel noise standard deviation.
"""

from __future__ import annotations

import os
import tempfile
import time

import numpy as np

SHAPE = (64, 64)
PERIOD, ANGLE, PHASE, VIS, MEAN = 10.0, 20.0, 0.7, 0.5, 100.0


def _clean(shape=SHAPE):
    h, w = shape
    x = np.arange(w) - (w - 1) / 2
    r = np.arange(h) - (h - 1) / 2
    t = np.deg2rad(ANGLE)
    u = np.cos(t) * x[None, :] - np.sin(t) * r[:, None]
    return MEAN * (1 + VIS * np.cos(2 * np.pi * u / PERIOD + PHASE))


def crlb(shape, amp, sigma):
    """Cramér–Rao s.d. of the period (px) and of the phase at the centre (rad)."""
    h, w = shape
    x = np.arange(w) - (w - 1) / 2
    r = np.arange(h) - (h - 1) / 2
    xx, rr = np.meshgrid(x, r)
    t = np.deg2rad(ANGLE)
    fx, fr = np.cos(t) / PERIOD, -np.sin(t) / PERIOD
    psi = 2 * np.pi * (fx * xx + fr * rr) + PHASE
    g = np.stack([np.ones_like(xx), np.cos(psi), -amp * np.sin(psi) * 2 * np.pi * xx,
                  -amp * np.sin(psi) * 2 * np.pi * rr, -amp * np.sin(psi)]).reshape(5, -1)
    cov = np.linalg.inv(g @ g.T / sigma**2)
    f = np.hypot(fx, fr)
    gp = np.array([0, 0, -fx / f**3, -fr / f**3, 0])
    return float(np.sqrt(gp @ cov @ gp)), float(np.sqrt(cov[4, 4]))


def fft_peak_baseline(img):
    """Plain FFT-peak estimator: the largest bin of the unpadded spectrum (mean removed),
    refined by a three-point parabola in each axis; phase from that bin, referred to the
    image centre."""
    h, w = img.shape
    spec = np.fft.fft2(img - img.mean())
    p = np.abs(spec) ** 2
    p[0, 0] = 0
    half = p.copy()
    half[h // 2 + 1:, :] = 0  # one half-plane (rows with f_row <= 0 folded later)
    iy, ix = np.unravel_index(np.argmax(p), p.shape)

    def par(a, b, c):
        den = a - 2 * b + c
        return 0.0 if den == 0 else 0.5 * (a - c) / den

    dy = par(p[(iy - 1) % h, ix], p[iy, ix], p[(iy + 1) % h, ix])
    dx = par(p[iy, (ix - 1) % w], p[iy, ix], p[iy, (ix + 1) % w])
    fr = np.fft.fftfreq(h)[iy] + dy / h
    fx = np.fft.fftfreq(w)[ix] + dx / w
    if np.arctan2(-fr, fx) < 0:
        fr, fx = -fr, -fx
        sign = -1
    else:
        sign = 1
    c = ((w - 1) / 2, (h - 1) / 2)
    # phase at the centre: DFT bin phase plus the shift to the centre
    ph = np.angle(spec[iy, ix]) if sign == 1 else -np.angle(spec[iy, ix])
    kx, ky = np.fft.fftfreq(w)[ix] * sign, np.fft.fftfreq(h)[iy] * sign
    ph = ph + 2 * np.pi * (kx * c[0] + ky * c[1])
    return 1.0 / np.hypot(fx, fr), float((ph + np.pi) % (2 * np.pi) - np.pi)


def accuracy(trials: int, snrs=(3, 10, 30, 100, 300, 1000)):
    from fringe.analyze import analyze_image

    rng = np.random.default_rng(2026)
    clean = _clean()
    amp = VIS * MEAN
    rows = []
    print(f"accuracy on {SHAPE[0]}x{SHAPE[1]} px, period {PERIOD} px, {ANGLE} deg, V {VIS}; "
          f"{trials} trials per SNR (SNR = A/sigma per pixel)")
    print(f"{'SNR':>6} | {'period RMSE':>11} {'FFT-peak':>10} {'CRLB':>10} {'ratio':>6} | "
          f"{'phase RMSE':>10} {'FFT-peak':>9} {'CRLB':>9} {'ratio':>6} | "
          f"{'cover P':>7} {'cover phi':>9} {'cover V':>7}")
    for snr in snrs:
        sigma = amp / snr
        e_p, e_ph, e_v, s_p, s_ph, s_v, b_p, b_ph = ([] for _ in range(8))
        for _ in range(trials):
            img = clean + rng.normal(0, sigma, SHAPE)
            r = analyze_image(img)
            if not r.ok:
                continue
            e_p.append(r.period_px - PERIOD)
            e_ph.append((r.phase_rad - PHASE + np.pi) % (2 * np.pi) - np.pi)
            e_v.append(r.visibility_raw - VIS)
            s_p.append(r.period_px_err)
            s_ph.append(r.phase_rad_err)
            s_v.append(r.visibility_raw_err)
            bp, bph = fft_peak_baseline(img)
            b_p.append(bp - PERIOD)
            b_ph.append((bph - PHASE + np.pi) % (2 * np.pi) - np.pi)
        cp, cph = crlb(SHAPE, amp, sigma)

        def rms(x):
            return float(np.sqrt(np.mean(np.square(x))))

        def cover(e, s):
            return float(np.mean(np.abs(e) <= 2 * np.asarray(s)))

        row = {"snr": snr, "period_rmse": rms(e_p), "period_baseline": rms(b_p),
               "period_crlb": cp, "phase_rmse": rms(e_ph), "phase_baseline": rms(b_ph),
               "phase_crlb": cph, "cover_period": cover(e_p, s_p),
               "cover_phase": cover(e_ph, s_ph), "cover_visibility": cover(e_v, s_v),
               "n": len(e_p)}
        rows.append(row)
        print(f"{snr:>6} | {row['period_rmse']:11.3e} {row['period_baseline']:10.3e} "
              f"{cp:10.3e} {row['period_rmse'] / cp:6.2f} | {row['phase_rmse']:10.3e} "
              f"{row['phase_baseline']:9.3e} {cph:9.3e} {row['phase_rmse'] / cph:6.2f} | "
              f"{row['cover_period']:7.2f} {row['cover_phase']:9.2f} "
              f"{row['cover_visibility']:7.2f}")
    return rows


def speed(sizes=((3000, 4000),), repeats: int = 3):
    import tifffile

    import fringe

    rows = []
    rng = np.random.default_rng(1)
    with tempfile.TemporaryDirectory() as tmp:
        for h, w in sizes:
            x = np.arange(w) - (w - 1) / 2
            r = np.arange(h) - (h - 1) / 2
            t = np.deg2rad(33.0)
            u = np.cos(t) * x[None, :] - np.sin(t) * r[:, None]
            img = 20000 * (1 + 0.5 * np.cos(2 * np.pi * u / 17.3 + 1.0))
            img = (img + rng.normal(0, 100, img.shape)).astype(np.uint16)
            path = os.path.join(tmp, f"frame-{h}x{w}.tif")
            tifffile.imwrite(path, img)
            del img, u
            fringe.measure(path)  # warm-up (imports, caches)
            floor, ours = [], []
            for _ in range(repeats):
                t0 = time.perf_counter()
                a = tifffile.imread(path)
                np.fft.rfft2(a)
                floor.append(time.perf_counter() - t0)
                del a
                t0 = time.perf_counter()
                res = fringe.measure(path)
                ours.append(time.perf_counter() - t0)
                assert res.ok, res.error
            row = {"pixels": h * w, "floor_s": min(floor), "measure_s": min(ours)}
            row["ratio"] = row["measure_s"] / row["floor_s"]
            rows.append(row)
            print(f"{h}x{w} ({h * w / 1e6:.1f} Mpx): floor (tifffile read + numpy rfft2) "
                  f"{row['floor_s']:.3f} s, fringe.measure {row['measure_s']:.3f} s, "
                  f"ratio {row['ratio']:.2f} (target <= 3)")
    if len(rows) >= 2:
        n = np.array([r["pixels"] for r in rows], dtype=float)
        tt = np.array([r["measure_s"] for r in rows])
        per = tt / (n * np.log(n))
        print("time / (N log N), relative to the smallest: "
              + ", ".join(f"{v / per[0]:.2f}" for v in per) + " (flat or falling = N log N "
              "or better)")
    return rows


def run(quick: bool = False) -> dict:
    trials = 40 if quick else 200
    acc = accuracy(trials)
    sizes = ((750, 1000), (1500, 2000), (3000, 4000)) if not quick else ((750, 1000),
                                                                          (3000, 4000))
    spd = speed(sizes, repeats=2 if quick else 3)
    return {"accuracy": acc, "speed": spd}


if __name__ == "__main__":
    run()
