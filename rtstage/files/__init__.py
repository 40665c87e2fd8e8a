"""Files: the one output policy (:mod:`.policy`) and RIFF/RF64/AIFF chunk reading and metadata carry (:mod:`.riff`)."""
