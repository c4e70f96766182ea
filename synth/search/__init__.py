"""Search: ask for parameter vectors, tell metrics back (see DESIGN.md, "Search")."""
