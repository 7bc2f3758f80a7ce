/* rng.c: the simulator's own deterministic PRNG (xoshiro256** with splitmix64 seeding) and
 * Gaussian deviates by the Box-Muller transform. State lives in the caller's struct. */
#include <math.h>

#include "sim_int.h"

/* splitmix64 (Steele, Lea and Flood 2014), the seeding generator xoshiro's authors recommend. */
uint64_t sim_splitmix64(uint64_t *state)
{
    uint64_t z = (*state += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

void sim_rng_seed(sim_rng *r, uint64_t seed)
{
    uint64_t st = seed;
    for (int i = 0; i < 4; i++)
        r->s[i] = sim_splitmix64(&st);
}

static inline uint64_t rotl(uint64_t x, int k)
{
    return (x << k) | (x >> (64 - k));
}

/* xoshiro256** 1.0 (Blackman and Vigna 2018). */
uint64_t sim_rng_next(sim_rng *r)
{
    uint64_t *s = r->s;
    uint64_t result = rotl(s[1] * 5, 7) * 9;
    uint64_t t = s[1] << 17;
    s[2] ^= s[0];
    s[3] ^= s[1];
    s[1] ^= s[2];
    s[0] ^= s[3];
    s[2] ^= t;
    s[3] = rotl(s[3], 45);
    return result;
}

/* 53 random bits mapped to (0, 1]: never 0, so log() in Box-Muller is finite. */
double sim_rng_uniform(sim_rng *r)
{
    return ((double)(sim_rng_next(r) >> 11) + 1.0) * 0x1.0p-53;
}

/* Box-Muller (Box and Muller 1958): two independent standard normal deviates. */
void sim_rng_normal2(sim_rng *r, double *a, double *b)
{
    double u1 = sim_rng_uniform(r);
    double u2 = sim_rng_uniform(r);
    double rad = sqrt(-2.0 * log(u1));
    double th = 2.0 * M_PI * u2;
    *a = rad * cos(th);
    *b = rad * sin(th);
}

void sim_rng_stream(sim_rng *r, uint64_t seed, uint64_t purpose, uint64_t index)
{
    uint64_t st = seed;
    uint64_t k = sim_splitmix64(&st);
    st = k ^ (purpose * 0xd1b54a32d192ed03ULL);
    k = sim_splitmix64(&st);
    st = k ^ (index * 0xa0761d6478bd642fULL);
    sim_rng_seed(r, sim_splitmix64(&st));
}
