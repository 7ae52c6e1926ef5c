"""Session state and the stores that keep it: in-process memory, Redis, Redis Cluster. One interface."""

from service.store.base import SessionStore, open_store
from service.store.memory import MemoryStore
from service.store.state import NEW_TOKEN, SessionState, decode, encode, token_of

__all__ = ["MemoryStore", "NEW_TOKEN", "SessionState", "SessionStore", "decode", "encode", "open_store", "token_of"]
