"""Coverage-guided fuzzing of watchkeep's inputs (DEVELOPERS.md, "Fuzzing").

One module per target (`fuzz_<target>.py`): each has `TARGET`, a `harness.Target` with
the input's oracle (`one_input(data)`, which raises on any finding), seed inputs made
from real payloads, and a Hypothesis strategy of the same inputs. `python -m tests.fuzz`
runs the targets under atheris (libFuzzer) for a set time (`make fuzz`);
`tests/fuzz/test_fuzz_pass.py` is the short pass `make test` runs.

This package imports no `agent` module at import time: the atheris runner must import
the agent under its instrumentation.
"""
