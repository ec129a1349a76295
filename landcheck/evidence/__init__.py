"""Evidence: maps, the HTML report and the one-parcel pre-screen."""
