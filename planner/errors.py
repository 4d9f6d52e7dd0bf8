"""One exception family for everything the planner refuses.

HTTP status codes are chosen in ``service/``; here an error only says what was wrong, with the
offending values in the message. Running out of time is not an error: it is a normal answer.
"""

from __future__ import annotations


class PlannerError(Exception):
    """Base class of every error the planner raises on purpose."""


class InvalidRequest(PlannerError, ValueError):
    """A request argument is outside what is allowed (the message says what is allowed)."""


class NodeNotFound(PlannerError, KeyError):
    """A node index is not in the graph, or a point is too far from the road network."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


class NoRoute(PlannerError):
    """No directed path exists between the origin and the destination."""


class GraphFileError(PlannerError):
    """A graph file is missing, of the wrong kind, corrupt or holds no usable roads."""


class GraphFileNotFound(GraphFileError, FileNotFoundError):
    """The graph or map file does not exist."""


class NotAMapFile(GraphFileError):
    """The file is neither OSM XML nor GraphML (or cannot be parsed as such)."""


class NoDrivableRoads(GraphFileError):
    """The map file parsed, but holds no road a car may use."""


class CorruptGraphFile(GraphFileError):
    """A compiled ``.npz`` graph is truncated, missing arrays or internally inconsistent."""
