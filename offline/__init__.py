"""The offline workbench, by stage: data (click logs to sessions), demo (the garden shop), model
(the GRU and its training), evaluate (metrics, baselines, the verdict), export (the artifact).

It may import `service` (the artifact format, settings, errors); `service` never imports it.
"""
