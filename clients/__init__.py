"""Client-side helpers for programs that talk to the wingwatch daemon."""

__all__: list[str] = []
