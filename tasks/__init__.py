"""Luigi tasks, product I/O and the command line of lightledger."""
