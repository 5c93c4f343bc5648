"""The front door of fixq: HTTP routes, the problem-document schema, job bookkeeping, CLI and client.

Importing this package imports nothing else, so ``service.schema`` can be used
without the web stack.
"""
