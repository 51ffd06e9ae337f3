/* placeholder until the module lands */ typedef int lk_align_placeholder_t;
