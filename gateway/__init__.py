"""Shoal: a local dispersal gateway.

Files written to one FUSE directory are cut into stripes, coded k-of-n and
spread over stores on different disks. The layers, each calling only
downward, are listed in docs/architecture.md.
"""
__version__ = "0.1.0"
