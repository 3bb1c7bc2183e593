"""train stage of detdiff (see DEVELOPERS.md)."""
