"""Stage 6, many parts: batches over folders, worker engines, strategy benchmarks, the demo scenario."""
