"""Running plans: the warehouse file and its layout, one incremental run per call (the per-session
stages on a connection of their own, the rest in one transaction), and the Spark session."""
