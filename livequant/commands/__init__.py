"""Sub-commands of the livequant command line, one module each."""
