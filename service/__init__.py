"""The front door of fixq: HTTP routes, job bookkeeping, the queue, the CLI and the client.

Importing this package imports nothing else.
"""
