/* placeholder until the module lands */ typedef int lk_face_placeholder_t;
