"""Reference model, stimulus and testbench runners (installed as ``dvgate.sim``)."""
