"""Built-in delivery targets (see flows/deliver.py for the interface)."""
