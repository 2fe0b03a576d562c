"""Example programs that use the client library."""

__all__: list[str] = []
