"""Board pin maps (installed as ``dvgate.constraints``)."""
