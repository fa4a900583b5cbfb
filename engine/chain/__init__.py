"""The chain: hook specifications, what a stage is, the plugin host and the pipeline that applies and records."""
