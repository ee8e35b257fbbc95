"""The configuration: the pydantic tree, sensor sections, routing, and the derived figures."""
