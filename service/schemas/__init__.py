"""Pydantic v2 models of the HTTP API's request and response bodies."""
