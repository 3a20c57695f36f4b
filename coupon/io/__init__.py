"""Reading inputs and writing outputs: images, tables, atomic files, batches."""
