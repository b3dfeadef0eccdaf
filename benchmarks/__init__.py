"""The benchmark harness: suites, runner, store, metrics, statistics and CLI."""
