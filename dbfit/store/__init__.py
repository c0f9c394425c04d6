"""The versioned model store inside the database."""
