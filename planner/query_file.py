"""Query files: one ``origin,destination`` pair of node indices per line (CSV).

The one reader every command uses (``dueroute route --queries``, ``dueroute loadtest
--queries``, ...). Format:

* UTF-8 text, comma-separated; blank lines and lines starting with ``#`` are skipped;
* the first remaining line may be the header ``origin,destination`` (recommended);
* every other line holds two integer node indices; extra columns are ignored.

Errors name the file and the line and say what is allowed.
"""

from __future__ import annotations

import csv
from pathlib import Path

from dueroute.planner.errors import InvalidRequest

HEADER = ("origin", "destination")


def read_query_file(path: str | Path, n_nodes: int | None = None) -> list[tuple[int, int]]:
    """``(origin, destination)`` pairs from a query file (see the module docstring).

    Parameters
    ----------
    path : str or Path
    n_nodes : int, optional
        When given, every index must be in ``0..n_nodes-1``.

    Raises
    ------
    InvalidRequest
        Missing or unreadable file, a bad line (file and line named), an index outside the
        graph, or no pairs at all.
    """
    path = Path(path)
    if not path.is_file():
        raise InvalidRequest(f"query file not found: {path}")
    pairs: list[tuple[int, int]] = []
    seen_data = False
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            for lineno, row in enumerate(csv.reader(fh), start=1):
                cells = [c.strip() for c in row]
                if not cells or all(not c for c in cells) or cells[0].startswith("#"):
                    continue
                if not seen_data and tuple(c.lower() for c in cells[:2]) == HEADER:
                    seen_data = True
                    continue
                seen_data = True
                if len(cells) < 2:
                    raise InvalidRequest(
                        f"{path}:{lineno}: expected two columns 'origin,destination' "
                        f"(node indices), got {','.join(row)!r}"
                    )
                try:
                    o, d = int(cells[0]), int(cells[1])
                except ValueError:
                    raise InvalidRequest(
                        f"{path}:{lineno}: origin and destination must be integer node "
                        f"indices, got {cells[0]!r},{cells[1]!r}"
                    ) from None
                for v in (o, d):
                    if v < 0 or (n_nodes is not None and v >= n_nodes):
                        allowed = f"0..{n_nodes - 1}" if n_nodes is not None else ">= 0"
                        raise InvalidRequest(
                            f"{path}:{lineno}: node {v} is not in the graph "
                            f"(valid node indices: {allowed})"
                        )
                pairs.append((o, d))
    except UnicodeDecodeError:
        raise InvalidRequest(f"{path}: not a UTF-8 text file") from None
    except csv.Error as exc:
        raise InvalidRequest(f"{path}: not a readable CSV file ({exc})") from None
    if not pairs:
        raise InvalidRequest(
            f"{path} holds no 'origin,destination' pairs (header 'origin,destination', then "
            "one pair of node indices per line)"
        )
    return pairs


def write_query_file(path: str | Path, pairs: list[tuple[int, int]]) -> Path:
    """Write ``pairs`` with the header, in the format :func:`read_query_file` reads."""
    path = Path(path)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(HEADER)
        writer.writerows(pairs)
    return path
