"""Draw a generated region (roads by class, river, sea, place names) with matplotlib (Agg).

``python -m demo_data.preview --size tiny -o /tmp/tiny.png`` renders straight from the
generator output (no import needed), which is how ``demo_data/preview.png`` is made.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from dueroute.demo_data.generate import RegionMap, generate

#: drawing order (first = underneath), colour and line width per ``highway`` value
_STYLE = {
    "track": ("#c8b99a", 0.3),
    "service": ("#c8c8c8", 0.3),
    "living_street": ("#b0b0b0", 0.35),
    "residential": ("#9a9a9a", 0.35),
    "unclassified": ("#7d6b55", 0.5),
    "tertiary": ("#6a6a6a", 0.7),
    "secondary": ("#d9a400", 1.1),
    "primary": ("#d9661a", 1.5),
    "motorway_link": ("#c0392b", 0.9),
    "motorway": ("#b0202d", 2.0),
}


def render_preview(
    region: RegionMap,
    path: str | Path,
    *,
    dpi: int = 110,
    size_in: float = 9.0,
    window_km: tuple[float, float, float, float] | None = None,
    colours: int | None = None,
) -> Path:
    """Render ``region`` to a PNG at ``path``.

    ``window_km`` = (x0, y0, x1, y1) crops to a window in km; ``colours`` writes a palette PNG
    with that many colours (smaller file, used for the committed preview).
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.collections import LineCollection

    x, y = region.x_km, region.y_km
    aspect = region.height_km / region.width_km
    if window_km is not None:
        aspect = (window_km[3] - window_km[1]) / (window_km[2] - window_km[0])
    fig, ax = plt.subplots(figsize=(size_in, size_in * aspect + 0.4))
    ax.set_facecolor("#f4f1e8")
    for ring in region.sea_km:
        ax.fill(ring[:, 0], ring[:, 1], color="#a9cbe6", zorder=0, lw=0)
    ax.plot(region.river_km[:, 0], region.river_km[:, 1], color="#4f8fc9", lw=2.2, zorder=1)
    by_class: dict[str, list[np.ndarray]] = {}
    bridges: list[np.ndarray] = []
    for w in region.ways:
        pts = np.column_stack([x[w.nodes], y[w.nodes]])
        by_class.setdefault(w.tags.get("highway", "road"), []).append(pts)
        if w.tags.get("bridge") == "yes":
            bridges.append(pts)
    for z, (cls, (colour, width)) in enumerate(_STYLE.items()):
        if cls in by_class:
            ax.add_collection(
                LineCollection(by_class[cls], colors=colour, linewidths=width, zorder=2 + z)
            )
    if bridges:
        ax.add_collection(LineCollection(bridges, colors="black", linewidths=3.0, zorder=30))
    for p in region.places:
        big = p.kind == "town"
        ax.text(
            p.x_km,
            p.y_km,
            p.name,
            fontsize=11 if big else 7.5,
            weight="bold" if big else "normal",
            ha="center",
            va="center",
            zorder=40,
            bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "none", "alpha": 0.75},
        )
    if window_km is None:
        ax.set_xlim(0, region.width_km)
        ax.set_ylim(0, region.height_km)
    else:
        ax.set_xlim(window_km[0], window_km[2])
        ax.set_ylim(window_km[1], window_km[3])
    ax.set_aspect("equal")
    ax.set_xlabel("km east")
    ax.set_ylabel("km north")
    ax.set_title(f"{region.name}: {region.n_nodes:,} OSM nodes, {len(region.ways):,} ways")
    fig.tight_layout()
    path = Path(path)
    if colours is None:
        fig.savefig(path, dpi=dpi)
    else:
        # a palette PNG is several times smaller for a line drawing with few colours
        import io

        from PIL import Image

        buf = io.BytesIO()
        fig.savefig(buf, dpi=dpi, format="png")
        buf.seek(0)
        with Image.open(buf) as img:
            img.convert("RGB").quantize(colors=colours, method=Image.Quantize.FASTOCTREE).save(
                path, optimize=True
            )
    plt.close(fig)
    return path


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--size", default="tiny")
    ap.add_argument("--seed", type=int, default=None)
    ap.add_argument("-o", "--out", required=True)
    ap.add_argument("--dpi", type=int, default=110)
    ap.add_argument("--inches", type=float, default=9.0)
    ap.add_argument("--window", type=float, nargs=4, default=None, metavar=("X0", "Y0", "X1", "Y1"))
    ap.add_argument("--colours", type=int, default=None, help="palette PNG with this many colours")
    args = ap.parse_args(argv)
    region = generate(args.size, seed=args.seed)
    render_preview(
        region,
        args.out,
        dpi=args.dpi,
        size_in=args.inches,
        window_km=tuple(args.window) if args.window else None,
        colours=args.colours,
    )
    print(args.out)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
