"""Typed ids, so that signatures say what they take."""
from __future__ import annotations

from typing import NewType

PoolId = NewType("PoolId", str)  # 32 hex digits
StoreId = NewType("StoreId", str)  # 32 hex digits
FileId = NewType("FileId", str)  # 32 hex digits, stable for an inode's life
Ino = NewType("Ino", int)  # inode number in the catalog; 1 is the root
StripeIndex = NewType("StripeIndex", int)  # position of a stripe in its file
StripeVersion = NewType("StripeVersion", int)  # pool-wide, strictly increasing
ShardIndex = NewType("ShardIndex", int)  # 0..k-1 data, k..n-1 parity
