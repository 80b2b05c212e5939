"""Small synthetic surveys for whole-run tests: straight lines crossing at one point over a flat reflector.

Traveltimes are exact for one homogeneous layer over a horizontal reflector
(core.forward.layered_reflection_traveltime with one layer), so every gather
fits; the lines, labels and survey name are chosen by the test.
"""

from pathlib import Path

import numpy as np
from rockhead.core.seismic import forward

CENTRE = np.array([500_000.0, 5_000_000.0])
VELOCITY_M_S = 1500.0


def write_small_survey(
    folder: Path,
    name: str = "small",
    depth_m: float = 15.0,
    lines=("EW", "NS"),
    shots=(2, 9, 16, 23, 30, 37),
    mispick=None,
    reflector=None,
    processing="",
) -> Path:
    """Write stations.csv, picks.csv and survey.toml; returns the survey.toml path.

    ``lines`` are labels of lines through the centre at azimuths spread over
    180 degrees; 41 stations 2 m apart each, shots at the station indices
    ``shots`` with receivers within 32 m. ``mispick`` = (line, shot index)
    adds 8 ms to one pick (one flagged gather). ``name`` is written as a TOML
    basic string (escapes allowed).
    """
    folder.mkdir(parents=True, exist_ok=True)
    stations, picks = [], []
    for i_line, line in enumerate(lines):
        az = 90.0 - 180.0 * i_line / len(lines)
        d = np.array([np.sin(np.radians(az)), np.cos(np.radians(az))])
        pos = (np.arange(41) - 20)[:, None] * 2.0 * d + CENTRE
        labels = [str(100 + i) for i in range(len(pos))]
        stations += [(line, lab, x, y) for lab, (x, y) in zip(labels, pos)]
        for i_shot in shots:
            rec = [j for j in range(max(0, i_shot - 16), min(41, i_shot + 17)) if j != i_shot]
            off = np.linalg.norm(pos[rec] - pos[i_shot], axis=1)
            t = forward.layered_reflection_traveltime(off, np.array([depth_m]), np.array([VELOCITY_M_S]))
            if mispick == (line, i_shot):
                t[3] += 0.008
            refl = "" if reflector is None else f",{reflector}"
            picks += [f"{line},{labels[i_shot]},{labels[j]},{tt * 1e3:.6f}{refl}" for j, tt in zip(rec, t)]
    (folder / "stations.csv").write_text(
        "line,station,x,y,z\n" + "".join(f"{a},{b},{x:.3f},{y:.3f},100\n" for a, b, x, y in stations), encoding="utf-8"
    )
    head = "line,shot,receiver,time_ms" + ("" if reflector is None else ",reflector")
    (folder / "picks.csv").write_text(head + "\n" + "\n".join(picks) + "\n", encoding="utf-8")
    (folder / "survey.toml").write_text(
        f'[survey]\nname = "{name}"\ncrs = "EPSG:32633"\n[files]\nstations = "stations.csv"\npicks = "picks.csv"\n'
        f'[processing]\nsurface_method = "kriging"\n{processing}',
        encoding="utf-8",
    )
    return folder / "survey.toml"
