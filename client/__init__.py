"""Grovekeeper's client: the commands that talk to a running server over HTTP.

Needs only httpx and the shared ``vocabulary``; never LightGBM, pandas or the service.
"""
