"""An invented site for tests: straight seismic lines over a dipping planar reflector.

The ground is a plane (any slope), the reflector a plane below a homogeneous
overburden, and every pick time is the exact image-source time
(Sheriff & Geldart 1995, ch. 4; ``core.seismic.forward.image_source_traveltime``),
with receivers and shots at their ground elevations. :func:`write_site` writes
the survey files the command line reads. Coordinates are local metres
placed in UTM zone 33N (``E0``, ``N0``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from rockhead.core.seismic import forward

E0, N0 = 500_000.0, 5_000_000.0


@dataclass
class PlaneSite:
    """The truth of the site and the lines shot over it.

    ``ground_slope`` is (dz/dx, dz/dy) of the ground plane through (0, 0,
    ``ground_m``); the reflector passes through (0, 0, ``ground_m - depth_m``)
    with ``dip_deg`` toward ``dip_direction_deg``. Each line is (name, centre
    (x, y) local, azimuth, number of stations); stations every ``spacing_m``,
    shots every ``shot_every`` stations with a split spread of ``half_spread``
    receivers each side.
    """

    velocity_m_s: float = 1800.0
    depth_m: float = 30.0
    dip_deg: float = 8.0
    dip_direction_deg: float = 120.0
    ground_m: float = 100.0
    ground_slope: tuple = (0.0, 0.0)
    spacing_m: float = 2.0
    shot_every: int = 4
    half_spread: int = 24
    sigma_ms: float = 0.2
    noise_ms: float = 0.0
    jitter_m: float = 0.0
    seed: int = 1
    bowl_radius_m: float = 0.0  # > 0: the plane bends down into a bowl of this radius of curvature
    bowl_centre: tuple = (0.0, 0.0)
    lines: list = field(default_factory=lambda: [("A", (0.0, 0.0), 90.0, 97)])

    def ground(self, x, y):
        """Ground elevation (m) at local x, y."""
        return self.ground_m + self.ground_slope[0] * np.asarray(x) + self.ground_slope[1] * np.asarray(y)

    @property
    def plane(self):
        """(normal, d) of the reflector plane (local coordinates)."""
        return forward.plane_through_point(
            [0.0, 0.0, self.ground_m - self.depth_m], self.dip_deg, self.dip_direction_deg
        )

    def reflector(self, x, y):
        """Reflector elevation (m) at local x, y."""
        n, d = self.plane
        z = forward.plane_elevation(x, y, n, d)
        if self.bowl_radius_m > 0:
            r2 = (np.asarray(x) - self.bowl_centre[0]) ** 2 + (np.asarray(y) - self.bowl_centre[1]) ** 2
            z = z - r2 / (2.0 * self.bowl_radius_m)
        return z

    def gradient(self, x, y):
        """(dz/dx, dz/dy) of the reflector at local x, y."""
        n, _ = self.plane
        gx, gy = -n[0] / n[2], -n[1] / n[2]
        if self.bowl_radius_m > 0:
            gx = gx - (np.asarray(x) - self.bowl_centre[0]) / self.bowl_radius_m
            gy = gy - (np.asarray(y) - self.bowl_centre[1]) / self.bowl_radius_m
        return gx, gy

    def _nodes(self):
        """North-up node grid (2 m) over the lines for the Fermat times of a bowl."""
        from rockhead.core.grid import GridSpec

        xy = np.concatenate([xyz[:, :2] for _, xyz in self.stations().values()])
        lo, hi = xy.min(axis=0) - 20.0, xy.max(axis=0) + 20.0
        n = np.ceil((hi - lo) / 2.0).astype(int) + 1
        grid = GridSpec(float(lo[0]), float(lo[1]) + 2.0 * (int(n[1]) - 1), 2.0, int(n[0]), int(n[1]))
        X, Y = grid.coords()
        return grid, self.reflector(X, Y)

    def times(self, S, R):
        """Two-way times (s): image source on the plane, Fermat's principle on a bowl."""
        if self.bowl_radius_m <= 0:
            n, d = self.plane
            return forward.image_source_traveltime(S, R, n, d, self.velocity_m_s)
        from rockhead.core.tomography.raypath import LayeredModel, trace_reflections

        grid, nodes = self._nodes()
        model = LayeredModel(grid, nodes[None], [[self.velocity_m_s, 0.0, 0.0, 0.0]], [[0.0, 0.0, 0.0]])
        paths = trace_reflections(model, S, R, np.zeros(len(S), int))
        assert paths.valid.all()
        return paths.time_s

    def stations(self):
        """{line: (labels, xyz)} of every line (local coordinates)."""
        rng = np.random.default_rng(self.seed)
        out = {}
        for name, centre, az, n in self.lines:
            u = np.array([np.sin(np.radians(az)), np.cos(np.radians(az))])
            t = (np.arange(n) - (n - 1) / 2) * self.spacing_m
            xy = np.asarray(centre, float) + t[:, None] * u
            xy = xy + rng.normal(0.0, self.jitter_m, xy.shape) if self.jitter_m else xy
            xyz = np.column_stack([xy, self.ground(xy[:, 0], xy[:, 1])])
            out[name] = ([str(1000 + i) for i in range(n)], xyz)
        return out

    def picks(self):
        """Rows (line, shot, receiver, time_ms) of exact times (+ noise when ``noise_ms``)."""
        rng = np.random.default_rng(self.seed + 1)
        keys, S, R = [], [], []
        for name, (labels, xyz) in self.stations().items():
            m = len(labels)
            for i in range(0, m, self.shot_every):
                rec = [j for j in range(max(0, i - self.half_spread), min(m, i + self.half_spread + 1)) if j != i]
                keys += [(name, labels[i], labels[j]) for j in rec]
                S.append(np.repeat(xyz[i][None], len(rec), 0))
                R.append(xyz[rec])
        t = self.times(np.concatenate(S), np.concatenate(R))
        if self.noise_ms:
            t = t + rng.normal(0.0, self.noise_ms * 1e-3, len(t))
        return [(a, b, c, tt * 1e3) for (a, b, c), tt in zip(keys, t)]


def write_site(folder: Path, site: PlaneSite, processing: str = "", boreholes=None, files: str = "") -> Path:
    """Write stations.csv, picks.csv (and boreholes.csv) and survey.toml; return the survey path.

    ``boreholes`` is a list of (name, x local, y local) drilled to the reflector
    (depth exact, sigma 0.05 m).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    st = ["line,station,x,y,z"]
    for name, (labels, xyz) in site.stations().items():
        st += [f"{name},{lab},{x + E0:.4f},{y + N0:.4f},{z:.4f}" for lab, (x, y, z) in zip(labels, xyz)]
    (folder / "stations.csv").write_text("\n".join(st) + "\n")
    pk = ["line,shot,receiver,time_ms,sigma_ms"]
    pk += [f"{a},{b},{c},{t:.6f},{site.sigma_ms}" for a, b, c, t in site.picks()]
    (folder / "picks.csv").write_text("\n".join(pk) + "\n")
    text = '[survey]\nname = "plane site"\ncrs = "EPSG:32633"\n'
    text += '[files]\nstations = "stations.csv"\npicks = "picks.csv"\n'
    if boreholes:
        rows = ["borehole,x,y,z,depth_m,sigma_m"]
        for name, x, y in boreholes:
            z = float(site.ground(x, y))
            rows.append(f"{name},{x + E0:.3f},{y + N0:.3f},{z:.4f},{z - float(site.reflector(x, y)):.4f},0.05")
        (folder / "boreholes.csv").write_text("\n".join(rows) + "\n")
        text += 'boreholes = "boreholes.csv"\n'
    text += files
    if processing:
        text += "[processing]\n" + processing.strip() + "\n"
    path = folder / "survey.toml"
    path.write_text(text)
    return path
