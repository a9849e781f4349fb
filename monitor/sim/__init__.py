"""The machine simulator behind the demo plant and the test scenarios."""
