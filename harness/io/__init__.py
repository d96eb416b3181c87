"""The edge: readers of the project's files (board, fixture, station, instrument profile,
capture).  Each turns a file into validated objects for the layers above, or a typed error
naming the file, the field and the fix; ``memory`` reads what the system says it can
give, which bounds what a reader may allocate.  Nothing else lives here."""
