/* placeholder until the module lands */ typedef int lk_learn_placeholder_t;
