"""Build the ALT landmarks beside a compiled graph, as the service would at start-up.

Run at image build time so that replicas, which mount the graph read-only, load the landmarks
instead of each computing them in memory::

    python /app/docker/build_landmarks.py GRAPH     # GRAPH: a .npz file or the word 'demo'

Same call and defaults as the service's warm-up (``dueroute.service.server.app.warm_up``), so the file it
writes (``<graph>.landmarks.npz``) is the one the service accepts (same graph fingerprint,
landmark count and method).
"""

from __future__ import annotations

import sys


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 1:
        print("usage: build_landmarks.py GRAPH (a .npz file or 'demo')", file=sys.stderr)
        return 2
    from dueroute.demo_data.build import resolve_graph_path
    from dueroute.planner.errors import PlannerError
    from dueroute.planner.graph import load_graph
    from dueroute.planner.heuristics import landmarks_path, load_or_build_landmarks

    try:
        path = resolve_graph_path(args[0])
        graph = load_graph(path)
        landmarks = load_or_build_landmarks(graph, progress=False)
    except PlannerError as exc:
        print(f"build_landmarks: error: {exc}", file=sys.stderr)
        return 2
    print(f"{landmarks.count} landmarks for {path} in {landmarks_path(path)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
