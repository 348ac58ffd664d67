"""Build orchestration: recipe loading, planning, running chunks, assembling the dataset."""
