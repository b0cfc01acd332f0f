"""Command line. Each command parses options, calls one library function and
turns wearcast's exceptions into a one-line message and an exit code."""
