"""The only modules that open files: readers validate inputs, writers write atomically."""
