"""One module per page section, in page order (see DEVELOPERS.md "Adding a view")."""
