"""The sample scenario simulator and the benchmark; not part of the core API."""
