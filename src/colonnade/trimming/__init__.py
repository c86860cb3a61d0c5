"""The trimming layer: adapter usage scores, pruning and merging of unsealed parts."""
