"""The live rig: the configuration (TOML), the live service (``ebullio run``) and the
demo over a simulated rig. Builds on runs, records, estimation and physics."""
