"""Pure numerics for life-contingent payment streams.

Nothing here imports Flask, marshmallow or reads files: the engine is a library on its own.
"""
