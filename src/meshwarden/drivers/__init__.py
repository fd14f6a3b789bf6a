"""Board drivers: the interface the controller talks to, a registry of types, the reference driver."""

from meshwarden.drivers.base import BoardDriver, BoardIdentity, BoardStatus, HeartbeatInfo
from meshwarden.drivers.registry import create_driver, register_driver

__all__ = ["BoardDriver", "BoardIdentity", "BoardStatus", "HeartbeatInfo", "create_driver", "register_driver"]
