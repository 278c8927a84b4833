"""trackproof host harness: suites, sessions, links, the simulator and analysis."""
