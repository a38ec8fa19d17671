"""The API's routes, one router per resource: scoring, models, health (with metrics), admin."""
