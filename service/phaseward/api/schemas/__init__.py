"""Pydantic models: the API's contract."""
