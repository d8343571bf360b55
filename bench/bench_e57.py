"""Reading speed and memory of E57 files against the size of the file (issue 18).

Usage::

    python bench/bench_e57.py                  # files of 2 and 10 million points
    python bench/bench_e57.py --sizes 1 5 20   # millions of points
    python bench/bench_e57.py --chunk 250000   # points per chunk

Each file is written through libE57Format (pye57's bindings) in 8 scans with non-trivial
poses, float64 coordinates, intensity and colour, one scan at a time (the writer holds one
scan). It is then read through ``inventory.io.clouds.open_cloud`` chunk by chunk, as the
survey step reads it, in a fresh process, and this prints the file size, points/s, and the
peak resident memory of the reading process (``getrusage``) minus the memory the process
held before reading: with streaming it follows the chunk size, not the file size.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np

SCANS = 8


def write_file(path: Path, n: int) -> None:
    from pye57 import libe57
    from scipy.spatial.transform import Rotation

    imf = libe57.ImageFile(str(path), "w")
    imf.extensionsAdd("", libe57.E57_V1_0_URI)
    root = imf.root()
    root.set("formatName", libe57.StringNode(imf, "ASTM E57 3D Imaging Data File"))
    root.set("guid", libe57.StringNode(imf, "{%s}" % uuid.uuid4()))
    root.set("versionMajor", libe57.IntegerNode(imf, libe57.E57_FORMAT_MAJOR))
    root.set("versionMinor", libe57.IntegerNode(imf, libe57.E57_FORMAT_MINOR))
    root.set("coordinateMetadata", libe57.StringNode(imf, "EPSG:25832"))
    root.set("data3D", libe57.VectorNode(imf, True))
    rng = np.random.default_rng(0)
    per = n // SCANS
    block = 500_000
    for k in range(SCANS):
        node = libe57.StructureNode(imf)
        node.set("guid", libe57.StringNode(imf, "{%s}" % uuid.uuid4()))
        q = Rotation.from_euler("ZYX", [45.0 * k, 1.0, -1.0], degrees=True).as_quat()
        pose, rot, tr = libe57.StructureNode(imf), libe57.StructureNode(imf), libe57.StructureNode(imf)
        for key, v in zip("wxyz", [q[3], q[0], q[1], q[2]]):
            rot.set(key, libe57.FloatNode(imf, float(v)))
        for key, v in zip("xyz", [486000.0 + 30 * k, 5734000.0, 5.0]):
            tr.set(key, libe57.FloatNode(imf, float(v)))
        pose.set("rotation", rot)
        pose.set("translation", tr)
        node.set("pose", pose)
        limits = libe57.StructureNode(imf)
        limits.set("intensityMinimum", libe57.FloatNode(imf, 0.0))
        limits.set("intensityMaximum", libe57.FloatNode(imf, 1.0))
        node.set("intensityLimits", limits)
        proto = libe57.StructureNode(imf)
        names = ["cartesianX", "cartesianY", "cartesianZ", "intensity"]
        for name in names:
            proto.set(name, libe57.FloatNode(imf, 0.0, libe57.E57_DOUBLE))
        for name in ("colorRed", "colorGreen", "colorBlue"):
            proto.set(name, libe57.IntegerNode(imf, 0, 0, 255))
        points = libe57.CompressedVectorNode(imf, proto, libe57.VectorNode(imf, True))
        node.set("points", points)
        root["data3D"].append(node)
        arrays = {name: np.zeros(block) for name in names}
        arrays.update({name: np.zeros(block, np.uint8) for name in ("colorRed", "colorGreen", "colorBlue")})
        bufs = libe57.VectorSourceDestBuffer()
        for name, a in arrays.items():
            bufs.append(libe57.SourceDestBuffer(imf, name, a, block, True, True))
        writer = points.writer(bufs)
        left = per
        while left:
            m = min(block, left)
            for name in ("cartesianX", "cartesianY"):
                arrays[name][:m] = rng.uniform(-60, 60, m)
            arrays["cartesianZ"][:m] = rng.uniform(-2, 10, m)
            arrays["intensity"][:m] = rng.uniform(0, 1, m)
            for name in ("colorRed", "colorGreen", "colorBlue"):
                arrays[name][:m] = rng.integers(0, 256, m)
            writer.write(m)
            left -= m
        writer.close()
    imf.close()


def read_file(path: str, chunk: int) -> dict:
    from inventory.io.clouds import open_cloud

    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    n = 0
    with open_cloud(path, chunk_size=chunk) as cloud:
        for c in cloud.chunks():
            n += len(c)
    dt = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"points": n, "seconds": dt, "rss_before_mb": before / 1024, "rss_peak_mb": peak / 1024}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=float, nargs="+", default=[2, 10])
    ap.add_argument("--chunk", type=int, default=1_000_000)
    ap.add_argument("--read", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.read:
        print(json.dumps(read_file(args.read[0], int(args.read[1]))))
        return
    with tempfile.TemporaryDirectory() as d:
        for size in args.sizes:
            n = int(size * 1e6)
            path = Path(d) / f"bench-{n}.e57"
            write_file(path, n)
            out = subprocess.run([sys.executable, __file__, "--read", str(path), str(args.chunk)],
                                 capture_output=True, text=True, check=True)
            r = json.loads(out.stdout)
            print(f"{n / 1e6:6.1f} M points, {path.stat().st_size / 2**20:8.1f} MiB: "
                  f"{r['points'] / r['seconds'] / 1e6:5.2f} M points/s, peak RSS {r['rss_peak_mb']:7.1f} MiB "
                  f"({r['rss_peak_mb'] - r['rss_before_mb']:6.1f} MiB above the process before reading; "
                  f"chunk {args.chunk:,})")
            path.unlink()


if __name__ == "__main__":
    main()
