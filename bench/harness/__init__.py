"""The one harness that starts, readies and stops processes (redis-server, `cairn serve`) on free
loopback ports, for the benchmarks, the load test and the tests alike."""
