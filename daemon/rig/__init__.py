"""Virtual rig: a physics-based flexible-plate simulator that streams like a tunnel DAQ."""

__all__: list[str] = []
