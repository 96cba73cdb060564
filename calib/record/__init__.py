"""Records: the frozen values calib stores, serves and prints, with their one JSON codec."""
