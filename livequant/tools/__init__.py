"""Developer tools: scoring sessions against the simulated instrument's truth."""
