"""Proving a link bit-transparent: the test sequence, the analyser, the live loop.

Public API
----------
sequence.sequence_frames, sequence.sequence_block, sequence.sequence_words
    The test sequence, a pure function of (seed, bits, samplerate, channels, frames).
writer.write_sequence
    The sequence into a sound file, through the output policy.
analyse.analyse, analyse.analyse_file
    Find the sequence in a capture and name what the path did (a JSON-ready report).
loop.play_and_record, loop.run_linktest
    Play and record in one duplex stream with a compiled callback (``rtstage linktest run``).

See docs/guide.md, section 9.  Caution: the sequence is full-scale noise.
"""
