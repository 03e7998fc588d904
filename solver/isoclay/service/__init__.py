"""The solver service: ZeroMQ server, jobs in limited worker processes, authentication (no torch here)."""
