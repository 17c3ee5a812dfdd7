"""FastAPI app, routers, pydantic schemas and error rendering."""
