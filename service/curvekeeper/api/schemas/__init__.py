"""Request schemas by resource; the core checks channel configurations itself."""
