"""shardsieve: Bloom-filter routing for sharded key-value fleets.

The package holds the I/O-free core (hashing, sizing, filters, codec, sync protocol
objects), configuration, the generated wire stubs (shardsieve.v1) and the CLI.
"""

__version__ = "0.1.0"
