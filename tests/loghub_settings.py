"""Per-system Drain settings and published accuracy for the Loghub 2k samples.

Copied from the shared datasets README (loghub-2k/README.md), whose source is
Zhu et al., "Tools and Benchmarks for Automated Log Parsing", ICSE-SEIP 2019,
accuracy table, Drain row; the masks / similarity / depth are recalled from
memory there. datasets.yaml carries the same values under each entry's `miner`.
"""

IP = r"(\d+\.){3}\d+"
DOTTED_NAME = r"([\w-]+\.){2,}[\w-]+"

LOGHUB_MINER_SETTINGS: dict[str, dict] = {
    "HDFS": {"masks": [r"blk_-?\d+", r"(\d+\.){3}\d+(:\d+)?"], "similarity": 0.5, "depth": 4},
    "Hadoop": {"masks": [IP], "similarity": 0.5, "depth": 4},
    "Spark": {"masks": [IP, r"\b[KGTM]?B\b", DOTTED_NAME], "similarity": 0.5, "depth": 4},
    "Zookeeper": {"masks": [r"(/|)(\d+\.){3}\d+(:\d+)?"], "similarity": 0.5, "depth": 4},
    "BGL": {"masks": [r"core\.\d+"], "similarity": 0.5, "depth": 4},
    "HPC": {"masks": [r"=\d+"], "similarity": 0.5, "depth": 4},
    "Thunderbird": {"masks": [IP], "similarity": 0.5, "depth": 4},
    "Windows": {"masks": [r"0x.*?\s"], "similarity": 0.7, "depth": 5},
    "Linux": {"masks": [IP, r"\d{2}:\d{2}:\d{2}"], "similarity": 0.39, "depth": 6},
    "Android": {
        "masks": [
            r"(/[\w-]+)+",
            DOTTED_NAME,
            r"\b(\-?\+?\d+)\b|\b0[Xx][a-fA-F\d]+\b|\b[a-fA-F\d]{4,}\b",
        ],
        "similarity": 0.2,
        "depth": 6,
    },
    "HealthApp": {"masks": [], "similarity": 0.2, "depth": 4},
    "Apache": {"masks": [IP], "similarity": 0.5, "depth": 4},
    "Proxifier": {
        "masks": [r"<\d+\ssec", r"([\w-]+\.)+[\w-]+(:\d+)?", r"\d{2}:\d{2}(:\d{2})*", r"[KGTM]B"],
        "similarity": 0.6,
        "depth": 3,
    },
    "OpenSSH": {"masks": [IP, DOTTED_NAME], "similarity": 0.6, "depth": 5},
    "OpenStack": {"masks": [r"((\d+\.){3}\d+,?)+", r"/.+?\s", r"\d+"], "similarity": 0.5, "depth": 5},
    "Mac": {"masks": [DOTTED_NAME], "similarity": 0.7, "depth": 6},
}

# Published Drain grouping accuracy (same source, accuracy table, Drain row).
PUBLISHED_DRAIN_GA: dict[str, float] = {
    "HDFS": 0.998,
    "Hadoop": 0.948,
    "Spark": 0.920,
    "Zookeeper": 0.967,
    "BGL": 0.963,
    "HPC": 0.887,
    "Thunderbird": 0.955,
    "Windows": 0.997,
    "Linux": 0.690,
    "Android": 0.911,
    "HealthApp": 0.780,
    "Apache": 1.000,
    "Proxifier": 0.527,
    "OpenSSH": 0.788,
    "OpenStack": 0.733,
    "Mac": 0.787,
}
