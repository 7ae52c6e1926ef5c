"""The online loop on the workbench side: read the service's click events back (event_source),
export them as a click log `cairn prepare` reads (export), and judge an experiment (report)."""
