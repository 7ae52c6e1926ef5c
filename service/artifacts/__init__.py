"""The `model_store/<name>/<version>/` artifact format: manifest, checksums, listing. The one thing
the offline workbench and the service share."""
