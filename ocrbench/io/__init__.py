"""Files in and out: text files (lines, page id <-> file stem, truth pairing), text folders."""
