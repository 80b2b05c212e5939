"""Make the demo survey of the (invented) Tarnwick Creek bridge site from a known truth.

Everything here is invented for the demo: the site, its name, the lines and the
ground. The truth is a bedrock surface that dips gently and carries a shallow
buried channel, under rolling ground, overlain by a homogeneous layer of
velocity ``VELOCITY_M_S``. Traveltimes are exact reflection times over that
curved surface (Fermat's principle: the reflection point makes the path
``|S-P| + |P-R|`` stationary), found by Newton iterations. Gaussian pick noise
and a few percent of mispicks (cycle skips) are added.

Run ``python sample_project/make_sample.py`` to rewrite the files next to this
script; the output is deterministic (fixed seed). Tests import this module to
evaluate the truth anywhere (``reflector_elevation``, ``ground_elevation``).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 1957
CRS = "EPSG:32633"  # WGS 84 / UTM zone 33N
EAST0_M, NORTH0_M = 512_400.0, 5_455_600.0  # site origin (invented)

VELOCITY_M_S = 1800.0  # overburden (saturated glacial sediments: common practice range 1500-2100 m/s)
PICK_SIGMA_MS = 0.3
MISPICK_FRACTION = 0.03
STATION_SPACING_M = 2.0
CHANNELS = 48
SHOT_EVERY = 8  # stations

# bedrock truth: plane + buried channel (Gaussian trough)
ROCK_ELEV0_M = 224.0  # at the site origin
DIP_DEG = 4.0
DIP_DIRECTION_DEG = 120.0
CHANNEL_DEPTH_M = 3.0
CHANNEL_WIDTH_M = 45.0  # Gaussian standard deviation across the axis
CHANNEL_AXIS_AZIMUTH_DEG = 30.0
CHANNEL_AXIS_POINT = (-30.0, 20.0)  # local coordinates of a point on the axis


def _local(x_m, y_m):
    return np.asarray(x_m, float) - EAST0_M, np.asarray(y_m, float) - NORTH0_M


def ground_elevation(x_m, y_m):
    """Ground elevation (m) of the invented site at projected (x, y)."""
    u, v = _local(x_m, y_m)
    return 250.0 + 0.020 * u - 0.012 * v + 1.2 * np.sin(u / 45.0) * np.cos(v / 60.0)


def _rock_parts(u, v):
    az = np.radians(DIP_DIRECTION_DEG)
    along_dip = u * np.sin(az) + v * np.cos(az)
    plane = ROCK_ELEV0_M - np.tan(np.radians(DIP_DEG)) * along_dip
    gx, gy = -np.tan(np.radians(DIP_DEG)) * np.sin(az), -np.tan(np.radians(DIP_DEG)) * np.cos(az)
    a = np.radians(CHANNEL_AXIS_AZIMUTH_DEG)
    # signed distance across the channel axis (unit normal to the axis)
    nx, ny = np.cos(a), -np.sin(a)
    d = (u - CHANNEL_AXIS_POINT[0]) * nx + (v - CHANNEL_AXIS_POINT[1]) * ny
    w2 = CHANNEL_WIDTH_M**2
    g = np.exp(-0.5 * d * d / w2)
    z = plane - CHANNEL_DEPTH_M * g
    dgdd = CHANNEL_DEPTH_M * g * d / w2  # d(-A g)/dd
    d2 = CHANNEL_DEPTH_M * g * (1.0 - d * d / w2) / w2
    zx, zy = gx + dgdd * nx, gy + dgdd * ny
    zxx, zxy, zyy = d2 * nx * nx, d2 * nx * ny, d2 * ny * ny
    return z, zx, zy, zxx, zxy, zyy


def reflector_elevation(x_m, y_m):
    """True bedrock elevation (m) at projected (x, y)."""
    u, v = _local(x_m, y_m)
    return _rock_parts(u, v)[0]


def reflector_gradient(x_m, y_m):
    """True (dz/dx, dz/dy) of the bedrock surface."""
    u, v = _local(x_m, y_m)
    _, zx, zy, *_ = _rock_parts(u, v)
    return zx, zy


def reflection_times(src, rec, velocity_m_s=VELOCITY_M_S, iterations=60):
    """Exact two-way times over the true surface by Fermat's principle.

    Minimises L(x, y) = |S - P| + |P - R| with P = (x, y, z(x, y)) by Newton
    steps on (x, y), started at the midpoint; returns (time_s, P).
    """
    src = np.asarray(src, float)
    rec = np.asarray(rec, float)
    p = 0.5 * (src[:, :2] + rec[:, :2])
    for _ in range(iterations):
        u, v = _local(p[:, 0], p[:, 1])
        z, zx, zy, zxx, zxy, zyy = _rock_parts(u, v)
        P = np.column_stack([p, z])
        a = P - src
        b = P - rec
        la = np.linalg.norm(a, axis=1)
        lb = np.linalg.norm(b, axis=1)
        ea, eb = a / la[:, None], b / lb[:, None]
        e = ea + eb
        tx = np.column_stack([np.ones_like(zx), np.zeros_like(zx), zx])
        ty = np.column_stack([np.zeros_like(zy), np.ones_like(zy), zy])
        grad = np.column_stack([np.sum(e * tx, 1), np.sum(e * ty, 1)])

        def proj(t1, t2, ea=ea, eb=eb, la=la, lb=lb):
            # d(e_a)/dP = (I - ea ea^T)/la, same for b
            return (np.sum(t1 * t2, 1) - np.sum(ea * t1, 1) * np.sum(ea * t2, 1)) / la + (
                np.sum(t1 * t2, 1) - np.sum(eb * t1, 1) * np.sum(eb * t2, 1)
            ) / lb

        hxx = proj(tx, tx) + e[:, 2] * zxx
        hxy = proj(tx, ty) + e[:, 2] * zxy
        hyy = proj(ty, ty) + e[:, 2] * zyy
        det = hxx * hyy - hxy * hxy
        step = np.column_stack(
            [(hyy * grad[:, 0] - hxy * grad[:, 1]) / det, (hxx * grad[:, 1] - hxy * grad[:, 0]) / det]
        )
        p = p - step
        if np.max(np.abs(step)) < 1e-11:
            break
    u, v = _local(p[:, 0], p[:, 1])
    P = np.column_stack([p, _rock_parts(u, v)[0]])
    length = np.linalg.norm(P - src, axis=1) + np.linalg.norm(P - rec, axis=1)
    return length / velocity_m_s, P


def _polyline_stations(start_local, azimuths_deg, lengths_m):
    """Stations every STATION_SPACING_M along a polyline of straight legs."""
    pts = [np.asarray(start_local, float)]
    for az, length in zip(azimuths_deg, lengths_m):
        n = round(length / STATION_SPACING_M)
        d = np.array([np.sin(np.radians(az)), np.cos(np.radians(az))])
        for _ in range(n):
            pts.append(pts[-1] + STATION_SPACING_M * d)
    return np.array(pts)


LINES = {
    # line: (start (local m), leg azimuths, leg lengths, spread kind)
    "A": ((-110.0, -40.0), [90.0], [220.0], "split"),
    "B": ((-78.0, -78.0), [45.0], [220.0], "split"),
    "C": ((-105.0, 85.0), [100.0, 132.0], [110.0, 110.0], "split"),  # crooked: follows a farm track
    "D": ((60.0, -110.0), [0.0], [220.0], "end_on"),
}


def _spread(i_shot, n_stations, kind):
    if kind == "end_on":
        idx = np.arange(i_shot + 1, i_shot + 1 + CHANNELS)
        if idx[-1] >= n_stations:  # near the end of the line shoot back the other way
            idx = np.arange(i_shot - CHANNELS, i_shot)
    else:
        half = CHANNELS // 2
        lo, hi = i_shot - half, i_shot + half
        if lo < 0:
            hi -= lo
            lo = 0
        if hi >= n_stations:
            lo -= hi - (n_stations - 1)
            hi = n_stations - 1
        idx = np.array([i for i in range(lo, hi + 1) if i != i_shot])[:CHANNELS]
    return idx[(idx >= 0) & (idx < n_stations)]


def make(out_dir: Path = HERE) -> dict:
    rng = np.random.default_rng(SEED)
    stations, picks = [], []
    for line, (start, azs, lens, kind) in LINES.items():
        local = _polyline_stations(start, azs, lens)
        x = local[:, 0] + EAST0_M
        y = local[:, 1] + NORTH0_M
        # survey jitter of the staked positions (GNSS, a few cm)
        x = x + rng.normal(0, 0.03, len(x))
        y = y + rng.normal(0, 0.03, len(y))
        z = ground_elevation(x, y)
        labels = [str(1001 + i) for i in range(len(x))]
        for lab, xi, yi, zi in zip(labels, x, y, z):
            stations.append((line, lab, round(xi, 3), round(yi, 3), round(zi, 3)))
        xyz = np.column_stack([x, y, z])
        shot_idx = np.arange(0, len(x), SHOT_EVERY)
        for i_shot in shot_idx:
            idx = _spread(i_shot, len(x), kind)
            src = np.repeat(xyz[i_shot][None, :], len(idx), axis=0)
            t, _ = reflection_times(src, xyz[idx])
            t_ms = t * 1e3 + rng.normal(0, PICK_SIGMA_MS, len(idx))
            bad = rng.random(len(idx)) < MISPICK_FRACTION
            t_ms[bad] += rng.choice([-1, 1], bad.sum()) * rng.uniform(4.0, 12.0, bad.sum())
            for j, tm in zip(idx, t_ms):
                picks.append((line, labels[i_shot], labels[j], round(float(tm), 3), PICK_SIGMA_MS))
    boreholes = []
    for name, (u, v) in {"BH-1": (-40.0, -36.0), "BH-2": (58.0, 30.0), "BH-3": (-10.0, 60.0)}.items():
        bx, by = u + EAST0_M, v + NORTH0_M
        bz = float(ground_elevation(bx, by))
        depth = bz - float(reflector_elevation(bx, by))
        boreholes.append((name, bx, by, round(bz, 2), round(depth, 2), 0.1))

    out_dir.mkdir(parents=True, exist_ok=True)
    _write_csv(
        out_dir / "stations.csv",
        ["line", "station", "x", "y", "z"],
        stations,
        "# Tarnwick Creek bridge (invented demo site): surveyed geophone stations and shot points, EPSG:32633",
    )
    _write_csv(
        out_dir / "picks.csv",
        ["line", "shot", "receiver", "time_ms", "sigma_ms"],
        picks,
        "# bedrock reflection picks, two-way time in milliseconds",
    )
    _write_csv(
        out_dir / "boreholes.csv",
        ["borehole", "x", "y", "z", "depth_m", "sigma_m"],
        boreholes,
        "# boreholes to bedrock (collar elevation z, depth to rock)",
    )
    (out_dir / "survey.toml").write_text(
        "# Demo survey of an invented site. Paths are relative to this file.\n"
        "[survey]\n"
        'name = "Tarnwick Creek bridge (demo)"\n'
        f'crs = "{CRS}"\n\n'
        "[files]\n"
        'stations = "stations.csv"\n'
        'picks = "picks.csv"\n'
        'boreholes = "boreholes.csv"\n',
        encoding="utf-8",
    )
    truth = {
        "site": "Tarnwick Creek bridge (invented demo site)",
        "crs": CRS,
        "seed": SEED,
        "origin_xy_m": [EAST0_M, NORTH0_M],
        "velocity_m_s": VELOCITY_M_S,
        "pick_sigma_ms": PICK_SIGMA_MS,
        "mispick_fraction": MISPICK_FRACTION,
        "reflector": {
            "elevation_at_origin_m": ROCK_ELEV0_M,
            "dip_deg": DIP_DEG,
            "dip_direction_deg": DIP_DIRECTION_DEG,
            "channel_depth_m": CHANNEL_DEPTH_M,
            "channel_width_sigma_m": CHANNEL_WIDTH_M,
            "channel_axis_azimuth_deg": CHANNEL_AXIS_AZIMUTH_DEG,
            "channel_axis_point_local_m": list(CHANNEL_AXIS_POINT),
            "formula": "z = z0 - tan(dip) * ((x-x0) sin(dd) + (y-y0) cos(dd)) - A exp(-d^2 / (2 w^2)), "
            "d = distance across the channel axis",
        },
        "ground": "z = 250 + 0.020 (x-x0) - 0.012 (y-y0) + 1.2 sin((x-x0)/45) cos((y-y0)/60)",
        "counts": {"stations": len(stations), "picks": len(picks), "boreholes": len(boreholes)},
    }
    (out_dir / "truth.json").write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
    return truth


def _write_csv(path, header, rows, comment):
    with open(path, "w", newline="", encoding="utf-8") as fh:
        fh.write(comment + "\n")
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        w.writerows(rows)


if __name__ == "__main__":
    info = make()
    print(json.dumps(info["counts"]))
