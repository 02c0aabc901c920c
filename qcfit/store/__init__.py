"""The store: the only package that imports SQLAlchemy."""
