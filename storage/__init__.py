"""Tables, queries and migrations. The only package that writes SQL."""
