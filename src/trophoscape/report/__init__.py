"""What a command leaves behind: figures, the HTML report, and the writers of each command's folder."""
