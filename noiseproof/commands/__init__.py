"""Subcommands, one module each, in the order ``--help`` lists them."""
from . import batch, demo, estimate, inspect, optimise, pack, study

COMMANDS = (demo, inspect, estimate, optimise, study, pack, batch)
