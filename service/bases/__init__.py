"""The basis registry: reads tables/ at start-up, validates, hashes, holds immutable bases."""

from service.bases.registry import Basis, Refusal, Registry, UnknownBasisError, load_registry

__all__ = ["Basis", "Refusal", "Registry", "UnknownBasisError", "load_registry"]
