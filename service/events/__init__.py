"""The click event log: what each answered click showed, written off the hot path (buffer, sinks),
and the experiment that splits visits between arms (experiment)."""
