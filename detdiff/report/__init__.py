"""report stage of detdiff (see DEVELOPERS.md)."""
