#!/usr/bin/env python3
"""Reference data for outrider's geography (service/geo): geodesic distances,
point-to-edge distances and polygon coverage.

Sources (named beside each value group in the output):
- geodesic distances: GeographicLib (Karney 2013), Python `geographiclib`,
  Geodesic.WGS84.Inverse -> s12 (metres);
- point-to-edge distance (edge straight in lon/lat, RFC 7946): minimum over
  the edge parameter t of geographiclib distances, by dense sampling (401
  points) then golden-section search around the best sample to 1e-13 in t.
  This is an independent method from the Rust code (Gauss-Newton on the
  azimuth);
- polygon coverage: shapely `covers` (planar, closed). For a multipolygon the
  answer is the union of per-polygon `covers` (touching polygons make an
  invalid OGC MultiPolygon, where predicates are not defined).

Demo geography is the invented district "Kellerby Basin"; the capital-city
coordinates are well-known public values (rounded, from memory).

Deterministic: no clock, seeded random.Random; rerun gives identical bytes.
Run: target/py/bin/python tests/reference/gen_geo.py
"""
import importlib.metadata as md
import json
import math
import os
import random
import sys

from geographiclib.geodesic import Geodesic
import shapely
from shapely.geometry import Point, shape

G = Geodesic.WGS84
OUT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "data", "geo.json")


def dist(lat1, lon1, lat2, lon2):
    return G.Inverse(lat1, lon1, lat2, lon2, Geodesic.DISTANCE)["s12"]


def kellerby_sites():
    # 4 x 4 grid, ~8 km spacing, row-major from the north-west corner.
    sites = []
    for r in range(4):
        for c in range(4):
            lat = round(-31.6 + (1.5 - r) * 0.072, 4)
            lon = round(148.1 + (c - 1.5) * 0.085, 4)
            sites.append((f"KB-{r * 4 + c + 1:02d}", lat, lon))
    return sites


CAPITALS = [  # (name, lat, lon) well-known city-centre coordinates (from memory)
    ("Sydney", -33.8688, 151.2093),
    ("Melbourne", -37.8136, 144.9631),
    ("Brisbane", -27.4698, 153.0251),
    ("Perth", -31.9523, 115.8613),
    ("Adelaide", -34.9285, 138.6007),
    ("Hobart", -42.8821, 147.3272),
    ("Darwin", -12.4634, 130.8456),
    ("Canberra", -35.2809, 149.1300),
    ("London", 51.5074, -0.1278),
    ("Wellington", -41.2865, 174.7762),
]


def distances():
    out = []
    sites = kellerby_sites()
    for i in range(len(sites)):
        for j in range(i + 1, len(sites)):
            a, b = sites[i], sites[j]
            out.append({"name": f"{a[0]}-{b[0]}", "a": [a[1], a[2]], "b": [b[1], b[2]],
                        "s12_m": dist(a[1], a[2], b[1], b[2])})
    for i in range(len(CAPITALS)):
        for j in range(i + 1, len(CAPITALS)):
            a, b = CAPITALS[i], CAPITALS[j]
            out.append({"name": f"{a[0]}-{b[0]}", "a": [a[1], a[2]], "b": [b[1], b[2]],
                        "s12_m": dist(a[1], a[2], b[1], b[2])})
    k = sites[0]
    special = [
        ("same point", (k[1], k[2]), (k[1], k[2])),
        ("about 1 cm", (k[1], k[2]), (k[1] + 1e-7, k[2])),
        ("about 1 m", (k[1], k[2]), (k[1] + 5e-6, k[2] + 7e-6)),
        ("equator quarter", (0.0, 0.0), (0.0, 90.0)),
        ("meridian pole to pole", (-90.0, 0.0), (90.0, 0.0)),
        ("near antipodal", (0.0, 0.0), (0.5, 179.7)),
        ("kellerby near antipode", (-31.6, 148.1), (31.5, -31.95)),
        ("across antimeridian", (-16.0, 179.99), (-16.0, -179.99)),
    ]
    for name, a, b in special:
        out.append({"name": name, "a": list(a), "b": list(b), "s12_m": dist(a[0], a[1], b[0], b[1])})
    return out


def edge_distance(p, a, b):
    """p, a, b = (lat, lon); edge straight in lon/lat. Metres."""
    def f(t):
        return dist(p[0], p[1], a[0] + t * (b[0] - a[0]), a[1] + t * (b[1] - a[1]))
    n = 400
    vals = [f(k / n) for k in range(n + 1)]
    k = min(range(n + 1), key=lambda i: vals[i])
    lo, hi = max(0, k - 1) / n, min(n, k + 1) / n
    gr = (math.sqrt(5) - 1) / 2
    x1, x2 = hi - gr * (hi - lo), lo + gr * (hi - lo)
    f1, f2 = f(x1), f(x2)
    while hi - lo > 1e-13:
        if f1 < f2:
            hi, x2, f2 = x2, x1, f1
            x1 = hi - gr * (hi - lo)
            f1 = f(x1)
        else:
            lo, x1, f1 = x1, x2, f2
            x2 = lo + gr * (hi - lo)
            f2 = f(x2)
    return min(vals[k], f1, f2, vals[0], vals[n])


def planar_edge_m(p, a, b):
    kx = 111_200.0 * math.cos(math.radians(p[0]))
    ky = 111_200.0
    ax, ay = (a[1] - p[1]) * kx, (a[0] - p[0]) * ky
    ex, ey = (b[1] - a[1]) * kx, (b[0] - a[0]) * ky
    l2 = ex * ex + ey * ey
    t = 0.0 if l2 == 0 else max(0.0, min(1.0, -(ax * ex + ay * ey) / l2))
    return math.hypot(ax + t * ex, ay + t * ey)


def edges(rng):
    out = []
    for i in range(60):
        a = (-31.6 + rng.uniform(-0.3, 0.3), 148.1 + rng.uniform(-0.3, 0.3))
        length = rng.choice([0.005, 0.02, 0.1, 0.3])
        ang = rng.uniform(0, 2 * math.pi)
        b = (a[0] + length * math.sin(ang), a[1] + length * math.cos(ang))
        t = rng.uniform(-0.3, 1.3)
        off = rng.choice([0.0001, 0.002, 0.02, 0.1, 0.5])
        base = (a[0] + t * (b[0] - a[0]), a[1] + t * (b[1] - a[1]))
        ang2 = rng.uniform(0, 2 * math.pi)
        p = (base[0] + off * math.sin(ang2), base[1] + off * math.cos(ang2))
        r = lambda x: round(x, 7)
        a, b, p = (r(a[0]), r(a[1])), (r(b[0]), r(b[1])), (r(p[0]), r(p[1]))
        out.append({"p": list(p), "a": list(a), "b": list(b), "distance_m": edge_distance(p, a, b)})
    # Axis-aligned and polar-ish cases.
    for p, a, b in [((-31.5, 148.0), (-31.6, 147.9), (-31.6, 148.1)),
                    ((-31.7, 148.0), (-31.6, 147.9), (-31.6, 148.1)),
                    ((-42.8, 147.3), (-42.9, 147.0), (-42.9, 147.6)),
                    ((-12.4, 130.8), (-12.5, 130.7), (-12.3, 130.9))]:
        out.append({"p": list(p), "a": list(a), "b": list(b), "distance_m": edge_distance(p, a, b)})
    return out


def poly_geojson(rings):
    return {"type": "Polygon", "coordinates": rings}


def square(lon0, lat0, w, h, ccw=True):
    r = [[lon0, lat0], [lon0 + w, lat0], [lon0 + w, lat0 + h], [lon0, lat0 + h], [lon0, lat0]]
    return r if ccw else r[::-1]


def polygons(rng):
    cases = []
    stonecroft = poly_geojson([[[148.02, -31.66], [148.09, -31.67], [148.11, -31.60],
                                [148.04, -31.57], [148.02, -31.66]]])
    # L-shaped, clockwise exterior (wrong winding on purpose), with a CCW hole.
    ridge = poly_geojson([
        [[148.15, -31.55], [148.25, -31.55], [148.25, -31.60], [148.20, -31.60],
         [148.20, -31.68], [148.15, -31.68], [148.15, -31.55]][::-1],
        square(148.16, -31.60, 0.03, 0.03),
    ])
    # Two paddocks sharing an edge, as a MultiPolygon.
    twin = {"type": "MultiPolygon", "coordinates": [
        [square(147.95, -31.75, 0.05, 0.04)], [square(148.00, -31.75, 0.05, 0.04, ccw=False)]]}
    fc = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "north"}, "geometry": poly_geojson([square(148.05, -31.50, 0.04, 0.02)])},
        {"type": "Feature", "properties": {"name": "south"}, "geometry": poly_geojson([square(148.05, -31.80, 0.04, 0.02)])},
    ]}
    for name, gj in [("stonecroft", stonecroft), ("ridge-l-with-hole", ridge), ("twin", twin), ("north-south", fc)]:
        if gj["type"] == "FeatureCollection":
            polys = [shape(f["geometry"]) for f in gj["features"]]
        elif gj["type"] == "MultiPolygon":
            polys = list(shape(gj).geoms)
        else:
            polys = [shape(gj)]
        rings = []
        for p in polys:
            rings.append(list(p.exterior.coords))
            rings.extend(list(h.coords) for h in p.interiors)
        pts = []
        for ring in rings:
            for k in range(len(ring) - 1):
                (x1, y1), (x2, y2) = ring[k], ring[k + 1]
                pts.append((x1, y1))                       # vertex
                pts.append(((x1 + x2) / 2, (y1 + y2) / 2))  # edge midpoint
                pts.append((x1 + 0.25 * (x2 - x1), y1 + 0.25 * (y2 - y1)))
        minx = min(p.bounds[0] for p in polys) - 0.1
        miny = min(p.bounds[1] for p in polys) - 0.1
        maxx = max(p.bounds[2] for p in polys) + 0.1
        maxy = max(p.bounds[3] for p in polys) + 0.1
        for _ in range(120):
            pts.append((round(rng.uniform(minx, maxx), 6), round(rng.uniform(miny, maxy), 6)))
        points = []
        for (x, y) in pts:
            covered = any(p.covers(Point(x, y)) for p in polys)
            segs = [(ring[k], ring[k + 1]) for ring in rings for k in range(len(ring) - 1)]
            # Planar pre-selection (degrees scaled by 111.2 km and cos lat;
            # within a few per cent here), then the exact minimiser on every
            # edge within 1.5 x the planar minimum + 500 m.
            approx = [planar_edge_m((y, x), (s0[1], s0[0]), (s1[1], s1[0])) for s0, s1 in segs]
            cut = 1.5 * min(approx) + 500.0
            best = min(edge_distance((y, x), (s0[1], s0[0]), (s1[1], s1[0]))
                       for (s0, s1), ap in zip(segs, approx) if ap <= cut)
            # Planar distance to the boundary in degrees (shapely): below
            # 1e-9 the covers answer depends on the last bit of the
            # coordinates, which JSON parsers need not reproduce exactly.
            planar = min(p.boundary.distance(Point(x, y)) for p in polys)
            points.append({"lon": x, "lat": y, "covers": covered, "boundary_m": best,
                           "planar_boundary_deg": planar})
        cases.append({"name": name, "geojson": json.dumps(gj, sort_keys=True), "points": points})
    return cases


def main():
    rng = random.Random(7946)
    data = {
        "generator": "tests/reference/gen_geo.py",
        "versions": {"python": sys.version.split()[0], "geographiclib": md.version("geographiclib"),
                     "shapely": shapely.__version__},
        "distances_source": "geographiclib Geodesic.WGS84.Inverse s12 (Karney 2013)",
        "distances": distances(),
        "edges_source": "min over t of geographiclib distance to lon/lat-straight edge (dense + golden section)",
        "edges": edges(rng),
        "polygons_source": "shapely covers (per polygon, union); boundary_m as edges_source over every ring",
        "polygons": polygons(rng),
    }
    with open(OUT, "w", encoding="utf-8") as f:
        json.dump(data, f, indent=1, sort_keys=True)
        f.write("\n")


if __name__ == "__main__":
    main()
