"""What a run leaves behind and what follows from it: the per-epoch reading and its file format,
the sinks that write it (JSONL, TensorBoard), stop advice, the verdict, trends, labels and the
HTML report. May import sgdstab.theory; never the shadow engines, the tracker or the command line
(the tracker imports these, not the other way round). Loads torch only to write TensorBoard."""
