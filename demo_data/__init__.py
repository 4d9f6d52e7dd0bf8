"""The fictional demo region (Veyrand Coast): scenario, generator, cached builds, query sets.

See ``demo_data/README.md``.
"""
