"""The log and its formats: the CSV interchange format, the SQLite recorder with its hash
chain and readers, and the one mapping of estimates, flags and run summaries to their
stored and published forms (``schema``). Builds on physics and estimation."""
