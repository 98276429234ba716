"""Amaranth components of the emulator (installed as ``dvgate.gateware``)."""
