"""Beyond one machine: the NATS JetStream engine (workers, leases, checkpoints)."""
