/* The fixed key ring and binding of the template fuzz target; make_seeds.py
 * holds the same values (keep them in step) to seal the seed records. Test
 * keys only: they protect nothing. */
#ifndef LIKENESS_FUZZ_TEMPLATE_H
#define LIKENESS_FUZZ_TEMPLATE_H

#define FUZZ_OLD_KEY_ID "t0123456789abcdef"
#define FUZZ_OLD_KEY_HEX "000102030405060708090a0b0c0d0e0f101112131415161718191a1b1c1d1e1f"
#define FUZZ_CUR_KEY_ID "tfedcba9876543210"
#define FUZZ_CUR_KEY_HEX "a0a1a2a3a4a5a6a7a8a9aaabacadaeafb0b1b2b3b4b5b6b7b8b9babbbcbdbebf"

/* docs/key-file.md, version 1. */
#define FUZZ_KEY_FILE                                                               \
    "likeness-keys 1\n"                                                             \
    "# fixed test keys of tests/fuzz/fuzz_template.c\n"                             \
    "template-key " FUZZ_OLD_KEY_ID " " FUZZ_OLD_KEY_HEX "\n"                       \
    "template-key " FUZZ_CUR_KEY_ID " " FUZZ_CUR_KEY_HEX " current\n"               \
    "apikey-hash-key 4142434445464748494a4b4c4d4e4f505152535455565758595a5b5c5d5e5f60\n" \
    "audit-signing-seed 6162636465666768696a6b6c6d6e6f707172737475767778797a7b7c7d7e7f80\n"

#define FUZZ_TEMPLATE_ID "00112233445566778899aabbccddeeff"
#define FUZZ_MODEL_ID "0f1e2d3c4b5a69788796a5b4c3d2e1f0"
#define FUZZ_FEATURE_CONFIG "crop=64x64;lbp=u2"

#endif
