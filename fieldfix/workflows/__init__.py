"""File-level jobs: each reads inputs through fieldfix.io, calls the numeric core and writes outputs."""
