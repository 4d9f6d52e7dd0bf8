"""dueroute: the best road route by a deadline, with a proven lower bound and gap.

One import namespace, four layers; each imports only from the layers before it:

``dueroute.planner``
    road graph, heuristics, the numba search kernel, search sessions, controllers, features
``dueroute.demo_data``
    the fictional demo region, its query sets and cached builds
``dueroute.policies``
    the learned weight controller: gymnasium environment, Double DQN, ONNX export and runtime
``dueroute.service``
    the HTTP server (``service.server``), the command line (``service.cli``) and the load
    tester (``service.loadtest``): three rooms, and the server imports neither of the others

The source folders sit at the top of the repository (``planner/``, ``demo_data/``,
``policies/``, ``service/``) and are installed under this package.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("dueroute")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0+unknown"
