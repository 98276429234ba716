from pathlib import Path

from dvgate.sim.diagram import documented_examples


def test_timing_document_shows_what_the_model_draws():
    text = Path("docs/timing.md").read_text()
    assert documented_examples().strip() in text
