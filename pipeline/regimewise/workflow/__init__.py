"""What Snakemake needs: validated settings at parse time, one stage function per rule, and each rule's code
fingerprint derived from the imports.
"""
