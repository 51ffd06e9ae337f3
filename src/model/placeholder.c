/* placeholder until the module lands */ typedef int lk_model_placeholder_t;
