"""The clerk's side: review page, audit trail, local samples."""
