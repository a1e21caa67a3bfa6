"""The ``riskprem`` command line: one module per command group; all printing lives here."""
