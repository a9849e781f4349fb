"""The machine simulator behind the demo plant and the test scenarios: modal response
(simulate, sdof), speed profiles and faults. It builds on the model; no pipeline stage
imports it (the ``simulate`` command and the demo do)."""
