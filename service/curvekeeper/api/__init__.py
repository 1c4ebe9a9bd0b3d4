"""The HTTP layer: schemas, routes by resource, auth, error mapping. No numerics here."""

from .app import create_app

__all__ = ["create_app"]
