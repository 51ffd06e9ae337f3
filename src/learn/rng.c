/* Seeded pseudo-random numbers for reproducible training and pair sampling.
 *
 * xoshiro256** and splitmix64 with the published constants of
 * D. Blackman, S. Vigna, "Scrambled linear pseudorandom number generators",
 * ACM Trans. Math. Softw. 47(4), 2021 (reference code at prng.di.unimi.it).
 * splitmix64 (G. Steele, D. Lea, C. Flood, "Fast splittable pseudorandom
 * number generators", OOPSLA 2014) expands the 64-bit seed into the 256-bit
 * state, as the xoshiro authors recommend, so no state is all zero. */
#include "likeness/learn.h"

static uint64_t splitmix64(uint64_t *x)
{
    uint64_t z = (*x += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

static inline uint64_t rotl(uint64_t x, int k)
{
    return (x << k) | (x >> (64 - k));
}

void lk_rng_seed(lk_rng *rng, uint64_t seed)
{
    uint64_t x = seed;
    for (int i = 0; i < 4; i++)
        rng->s[i] = splitmix64(&x);
}

uint64_t lk_rng_next(lk_rng *rng)
{
    uint64_t *s = rng->s;
    const uint64_t result = rotl(s[1] * 5, 7) * 9;
    const uint64_t t = s[1] << 17;
    s[2] ^= s[0];
    s[3] ^= s[1];
    s[1] ^= s[2];
    s[0] ^= s[3];
    s[2] ^= t;
    s[3] = rotl(s[3], 45);
    return result;
}

uint64_t lk_rng_below(lk_rng *rng, uint64_t n)
{
    if (n <= 1)
        return 0;
    /* Rejection keeps every value equally likely: accept only draws below the
     * largest multiple of n that fits in 2^64. */
    const uint64_t limit = UINT64_MAX - (UINT64_MAX % n);
    uint64_t r;
    do {
        r = lk_rng_next(rng);
    } while (r >= limit);
    return r % n;
}

double lk_rng_uniform(lk_rng *rng)
{
    /* Top 53 bits times 2^-53 (Vigna's recommended conversion). */
    return (double)(lk_rng_next(rng) >> 11) * 0x1.0p-53;
}

void lk_rng_shuffle(lk_rng *rng, size_t *a, size_t n)
{
    /* Fisher-Yates / Durstenfeld (Knuth TAOCP vol. 2, Algorithm 3.4.2P). */
    for (size_t i = n; i > 1; i--) {
        size_t j = (size_t)lk_rng_below(rng, i);
        size_t t = a[i - 1];
        a[i - 1] = a[j];
        a[j] = t;
    }
}
