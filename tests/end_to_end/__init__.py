"""End-to-end tests: the example study, whole runs, the command line, report and docs."""
